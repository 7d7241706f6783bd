"""Outputs: atomic writes, field formats, pictures and colour scale, the report."""
