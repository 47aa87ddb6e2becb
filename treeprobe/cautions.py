"""The cautions printed beside results: what path structure and H-statistics cannot tell.

Each caution is written once here and shown by every command that prints
results, so the wording cannot drift apart between commands.

Examples
--------
>>> len(CAUTIONS)
4
>>> print(CAUTIONS[0].split(":")[0])
Structure is not causation
"""

from __future__ import annotations

__all__ = ["NOT_CAUSAL", "DEPENDENT_FEATURES", "MODEL_NOT_WORLD", "DECISIONS_ABOUT_PEOPLE", "CAUTIONS"]

NOT_CAUSAL = (
    "Structure is not causation: the trees record which features helped them fit the data, not what causes what."
)
DEPENDENT_FEATURES = (
    "H-statistics extrapolate when features are dependent: partial dependence then evaluates the model on "
    "combinations of values the data never hold, which can create or hide interactions."
)
MODEL_NOT_WORLD = (
    "A model's interactions are not the world's: another model fitted to the same data may combine the features "
    "differently."
)
DECISIONS_ABOUT_PEOPLE = (
    "Where a model decides about people (credit, health, hiring), this output supports, and does not replace, the "
    "model-risk review that local rules require."
)
CAUTIONS = (NOT_CAUSAL, DEPENDENT_FEATURES, MODEL_NOT_WORLD, DECISIONS_ABOUT_PEOPLE)

