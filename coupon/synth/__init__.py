"""Seeded, deterministic generator of test scenes with their ground truth.

Every scene function takes a ``seed`` and returns the image (float32 sRGB,
package convention) and a ground-truth dict.  The same seed gives the same
pixels on every machine (NumPy's PCG64 generator, OpenCV's JPEG codec).
Invented scenes only: they exist for tests, benchmarks and the demo.
"""
