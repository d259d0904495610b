"""Files: rating and attribute tables, atomic outputs, and the model file's format (no pickle).

Imports only hybrid.common.
"""
