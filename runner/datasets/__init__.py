"""Data sources (CSV, NPZ, bundled sets) and each seed's split of them."""
