"""Standing texts that travel with every product."""

CAUTION = (
    "These grids are model products: ages interpolated from interpreted magnetic-anomaly picks, and "
    "depths, heat flow and anomalies predicted by published models from those ages. Check them "
    "against local data and licensed professional practice before using them in any safety or hazard "
    "decision.")
