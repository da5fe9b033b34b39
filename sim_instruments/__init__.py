"""Shipped data files (sim_instruments); a package only so an installed labrun can find them."""
