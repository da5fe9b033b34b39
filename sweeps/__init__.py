"""Shipped data files (sweeps); a package only so an installed labrun can find them."""
