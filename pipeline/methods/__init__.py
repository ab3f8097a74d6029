"""Pure math: arrays in, arrays or frozen dataclasses out. No files, no config objects."""
