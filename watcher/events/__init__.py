"""Events in a zone's record: door openings, defrost cycles and excursions (detection is pure)."""
