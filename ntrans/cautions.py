"""The cautions every output that carries adjusted n values must state."""

CAUTIONS: tuple[str, ...] = (
    "The adjusted n values are a physically based starting point for calibration in the "
    "target model, not a substitute for calibration against observed data.",
    "A qualified engineer must review these results before they are used.",
    "Local codes, agency guidance and licensed practice take precedence over anything "
    "ntrans reports.",
)

CAUTIONS_TEXT = " ".join(CAUTIONS)
