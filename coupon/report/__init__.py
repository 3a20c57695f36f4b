"""Outputs people read: figures, overlays, tables and reports."""
