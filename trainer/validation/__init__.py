"""Every split and fold a training job uses: the holdout and the Nyström parts
(:mod:`.splits`), and what a tuning candidate is scored on (:mod:`.folds`)."""
