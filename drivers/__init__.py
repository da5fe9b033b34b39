"""Shipped data files (drivers); a package only so an installed labrun can find them."""
