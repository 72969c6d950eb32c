"""File formats: one module per format, no format knowledge in the algorithms."""
