"""ratebook: publish survey proportions with design-based intervals, reliability flags and
disclosure control, from one YAML file."""

__version__ = "0.1.0"
