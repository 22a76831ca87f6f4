"""Conventions stated in every summary and rule file, in one place (no dependencies)."""

BOUND_CONVENTION = ("one-sided upper bound on the true error rate at 95 % confidence (delta = 0.05), "
                    "with ln(1/delta) for the finite-class bound and ln(4/delta) inside Vapnik's bound; "
                    "Vapnik's bound is vacuous (1.0) when the VC dimension h is at least the number m of "
                    "training patches; each rung's bound holds for that rung alone, as if it were the only "
                    "rung tried: it does not account for the recommendation choosing among the rungs")
UNDEFINED_CONVENTION = "ratios with a zero denominator (e.g. precision with no predicted positive) are null"

# Defaults of the ladder, the same for the command line and the window (one set, defined here).
#: Largest size on every family's axis: None, each family's own sizes.
DEFAULT_MAX_SIZE: int | None = None
#: Cross-validation folds on the training part.
DEFAULT_FOLDS = 5

# Large sets: the work that repeats a fit runs on a stratified subsample of the training part.
#: Training patches above which every family's CV folds and the checks' refits (bias and variance,
#: learning curve) run on a stratified subsample of this many; the families in SUBSAMPLED_FAMILIES
#: train on their own subsample (drawn from this one), the others' final fit uses every training
#: patch, and the held-out metrics every held-out patch.
SUBSAMPLE_PATCHES = 100_000
#: The families whose training time grows fastest with the number of patches, and the stratified
#: subsample each trains on (CV folds and final fit) when the training part is larger: the networks
#: on fewer, because one network fit costs (patches x pixels x hidden units x iterations).
SUBSAMPLED_FAMILIES = {"logistic": 100_000, "mlp": 20_000}
#: Held-out patches above which the permutation importance maps and the stress tests use a
#: stratified subsample of this many (the held-out metrics always use every held-out patch).
HELD_OUT_SAMPLE = 20_000

# Defaults the command line shows before it imports the core (pixelfit.robustness uses them).
#: Bootstrap replicates per rung of the bias-variance decomposition.
DEFAULT_REPLICATES = 5
#: How ``--augment`` may extend the training part.
AUGMENTS = ("none", "shift1")
