"""Host codes: the array-level API on host arrays (:mod:`.embed`), C-callable
entry points (:mod:`.cfuncs`, with ``c/galerkit.h`` and a C host program in
``c/``) and a matrix-free operator adapter (:mod:`.operators`)."""
