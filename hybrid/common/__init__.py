"""The rules every layer shares: the error type users see and the table of settings' ranges.

Imports nothing from hybrid.
"""
