"""The lensrec Jupyter workbench (built on the lensrec library; all physics lives there)."""
