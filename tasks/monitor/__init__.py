"""Stage 5, monitor: the night's drift metrics, their time series, skew-shift alert rules, alert
delivery and the HTML/JSON report."""
