"""Building blocks of the verdict: reported claims, their reconciliation with the
data, and the sensitivity of an "absent" claim.

Importing this package has no side effects.
"""

from .claim import Claim, parse_claim

__all__ = ["Claim", "parse_claim"]
