"""Alerts: the policy (pure: rules, hysteresis, lifecycle) and, later, delivery."""
