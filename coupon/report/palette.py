"""Colours shared by every figure and overlay, in a module that imports nothing heavy.

Overlays drawn with OpenCV (panels, pits) take their colours from here without loading
matplotlib; :mod:`coupon.report.figures` re-exports them for the matplotlib figures.
"""

#: matplotlib colour map for pH (perceptual; never the indicator's own colours).
PH_CMAP = "viridis"
#: Grey for pixels without data (no pH, outside the drop).
NO_DATA_GREY = (0.78, 0.78, 0.78)
#: Okabe & Ito (2008), "Color universal design": colour-blind-safe categorical palette.
PALETTE = ("#0072B2", "#E69F00", "#009E73", "#D55E00", "#CC79A7", "#56B4E9", "#F0E442", "#000000")
