"""The verdict stage: reported claims and their reconciliation with the data,
the size check on data shaped like this dataset, the trust rules, the
sensitivity of an "absent" claim, and the verdict itself.

Importing this package has no side effects.
"""

from .calibration import Calibration, CalibrationRow, Shrinkage, size_check
from .claim import Claim, parse_claim
from .conclude import VERDICTS, EffectVerdict, Reason, Verdict, exit_status
from .judge import ClaimRecord, Judgement, judge, parse_claims, parse_equivalence
from .reconcile import ClosestMatch, ReconcileCheck, Reconciliation, decision_of_claim, reconcile
from .sensitivity import DetectableEffect, EquivalenceResult, detectable_interaction, equivalence_test
from .trust import TRUST_RULES, MethodTrust, TrustRule, assess_trust

__all__ = [
    "Calibration", "CalibrationRow", "Shrinkage", "size_check",
    "Claim", "parse_claim",
    "VERDICTS", "EffectVerdict", "Reason", "Verdict", "exit_status",
    "ClaimRecord", "Judgement", "judge", "parse_claims", "parse_equivalence",
    "ReconcileCheck", "ClosestMatch", "Reconciliation", "reconcile", "decision_of_claim",
    "DetectableEffect", "EquivalenceResult", "detectable_interaction", "equivalence_test",
    "TRUST_RULES", "MethodTrust", "TrustRule", "assess_trust",
]
