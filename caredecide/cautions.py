"""The cautions shown on every page, in CLI output, reports and the README."""

CAUTION_SHORT = (
    "RESEARCH USE ONLY - not a substitute for clinical judgment, local guidelines or "
    "licensed practice. Demo data are synthetic."
)

CAUTION_LONG = (
    "caredecide is a research-use-only decision aid. Its results come from a model and the "
    "estimates put into it; they are not a substitute for clinical judgment, local guidelines "
    "or licensed practice, and must not be used to make decisions about individual patients. "
    "The bundled models and cohort data are synthetic: no real patients, places or people."
)
