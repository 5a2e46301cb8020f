"""Sillmark web application (Flask); imports analysis, never the reverse."""
