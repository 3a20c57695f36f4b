"""Calibration: pixels to millimetres, colour correction, indicator colour to pH, profiles."""
