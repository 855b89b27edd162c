"""Blending sources: normalizers, weights, rank fusion."""
