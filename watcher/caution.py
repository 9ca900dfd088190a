"""The caution every output that could steer a safety or hold/release decision carries: one
text, in full where there is room (alerts, summaries, simulate, status) and short in tables."""

CAUTION = (
    "Texture-quality prediction only, not a food-safety verdict: safety, hold/release and recall "
    "decisions follow your food-safety plan and local regulations. -18 C is a benchmark for "
    "quick-frozen foods, not a legal limit for ice cream. Refrigeration faults are for a licensed technician."
)
SHORT = "Texture-quality prediction only, not a food-safety verdict: release decisions follow your food-safety plan."
