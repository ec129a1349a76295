"""Grid geometry shared by every stage: grids and windows, ellipsoid formulas, ground areas."""
