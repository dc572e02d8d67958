"""Choosing kernel parameters and ridge: the search (:mod:`.search`), the width range
(:mod:`.widths`) and where candidates run (:mod:`.workers`)."""
