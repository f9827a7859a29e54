"""Layer 3: physics built on the solvers: the Burgers flow and its predictions, branch points,
continuation through folds and beyond them, thermodynamics."""
