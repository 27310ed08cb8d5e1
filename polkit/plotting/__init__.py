"""Every figure polkit draws (matplotlib, Agg-safe); the pure floors never import this package."""
