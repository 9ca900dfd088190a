"""File edges: reading and writing profiles, temperature series and trial tables.

All file I/O of the model's inputs lives here; errors name the file, the row or key, the value
and what was expected.
"""
