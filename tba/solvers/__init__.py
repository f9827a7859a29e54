"""Layer 2: discretised TBA equations and their iteration (grids, Newton, error estimates).

Solvers use models (`tba.models`) and the compiled routines (`kernels`); they never import
scans, storage, plots or the command line.
"""
