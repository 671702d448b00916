"""Command-line commands that join several layers (the results of a run: ``export``,
``results-table``, ``plot``), above the analysis and report code they call.

Each module declares its parsers cheaply; the work is imported when a command runs.
"""
