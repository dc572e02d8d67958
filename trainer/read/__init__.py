"""Reading: the streaming reader of every input format (:mod:`.source` and its parts) and the
choice of the rows and columns a fit uses (:mod:`.columns`)."""
