"""MPI ranks: partitioning without MPI (:mod:`.partition`) and the distributed
engine on PETSc (:mod:`.petsc_engine`, imported only when used)."""
