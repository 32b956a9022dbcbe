"""The experiment file: loading it, its YAML nodes, templates, sections and factor roles."""
