"""Judging kernels before they are used in fits: the check's criteria (``criteria``), the
width-resolving power for a measurement's noise (``resolution``), the reference regularised
inversion (``inversion``) and the report page (``report``). Uses the layers below."""
