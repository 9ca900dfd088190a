"""Storage: the only package that imports sqlite-utils."""
