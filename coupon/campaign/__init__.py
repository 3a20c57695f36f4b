"""Test campaigns: the SQLite campaign store, ratings over exposure time, failure criteria.

* :mod:`coupon.campaign.store`: one SQLite file per campaign (systems, specimens,
  inspections, every measurement row the commands produce); :func:`record_results`
  is the one call a command makes after each image.
* :mod:`coupon.campaign.criteria`: failure criteria (JSON file or defaults).
* :mod:`coupon.campaign.timeline`: ratings against exposure time per specimen and per
  system, time to failure, rust growth rate, system ranking.
"""
