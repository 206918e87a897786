"""People: the ``galerkit`` command (:mod:`.cli`), problem files
(:mod:`.problemfile`) and the coefficient formulas in them (:mod:`.expressions`)."""
