"""Campaigns of many fits on Dask: simulation-based calibration and forecasts."""
