"""Weekly damage summaries: the only place that imports pandas and matplotlib."""
