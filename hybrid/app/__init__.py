"""The application: settings files, the steps the CLI and the demo share, the demo and the report.

Imports every library layer; never hybrid.cli.
"""
