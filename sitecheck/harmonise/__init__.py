"""Harmonisation: the estimators (centre, scale, quantile, ComBat), fitting and applying them, and the scan's check."""
