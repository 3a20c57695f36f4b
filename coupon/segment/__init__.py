"""Segmentation: one sub-package or module per job."""
