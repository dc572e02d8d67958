"""The Nyström solver: numerics (:mod:`.numerics`), pass 1 (:mod:`.scan`), the parts and
pass 2 (:mod:`.parts`, :mod:`.pass2`, :mod:`.cluster`), tuning on the sample (:mod:`.tune`),
held-out scores (:mod:`.scores`) and the job (:mod:`.job`)."""
