"""The cautions kridge shows wherever people may act on its numbers, written once.

A kernel ridge model interpolates the data it was trained on; away from that data its answers
are guesses with no error bound. The HTTP answers, the pages, ``kridge predict``, the demo, the
training report and the OpenAPI document all word this the same way, from here.
"""

from __future__ import annotations

#: Added to a predict answer (and shown beside a tried row) when a row lies outside the
#: training envelope.
OUTSIDE_ENVELOPE = (
    "At least one row lies outside the training envelope (see envelope): its prediction is an "
    "extrapolation. Do not let it drive process or safety decisions without a check against "
    "site procedures and review by a qualified person."
)

#: The general caution: reports, pages, ``kridge predict``, the demo and the API description.
BEFORE_ACTING = (
    "Predictions are estimates from past data. Rows outside the training envelope "
    "(out-of-range, novel or unusually shaped inputs, or a prediction outside its target's "
    "training range) are extrapolations and may be far off; their intervals are not "
    "calibrated there. Before acting on a prediction — changing a recipe, releasing or holding a "
    "batch — follow your site's procedures and have a qualified person review the result "
    "against measurements."
)

#: Shown with every ``kridge drift`` result, alarm or not.
DRIFT_ALARM = (
    "A drift alarm says the new rows are unlikely to come from the distribution the model "
    "was trained on; it is a reason to check the process, the sensors and the model's recent "
    "errors against lab values, not proof that the model is wrong. No alarm is no proof that "
    "the model is right either: a small batch can hide a real change."
)
