"""The experiment file: loading it, its YAML nodes, templates, sections and factor roles."""

#: The level a conditional factor carries in cells where it does not apply (``space.py``
#: owns the rules; the constant lives here so that the analysis of a plain CSV can test
#: for it without importing the YAML machinery).
NOT_APPLIED = "-"
