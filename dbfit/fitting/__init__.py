"""Fitting: statistics queries, row terms, the fit drivers and the adjustments (Firth, robust, prior correction, penalty)."""
