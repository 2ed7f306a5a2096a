"""Building blocks of the verdict: reported claims, their reconciliation with the
data, and the sensitivity of an "absent" claim.

Importing this package has no side effects.
"""

from .claim import Claim, parse_claim
from .reconcile import ClosestMatch, ReconcileCheck, Reconciliation, decision_of_claim, reconcile
from .sensitivity import DetectableEffect, EquivalenceResult, detectable_interaction, equivalence_test

__all__ = [
    "Claim",
    "parse_claim",
    "ReconcileCheck",
    "ClosestMatch",
    "Reconciliation",
    "reconcile",
    "decision_of_claim",
    "DetectableEffect",
    "EquivalenceResult",
    "detectable_interaction",
    "equivalence_test",
]
