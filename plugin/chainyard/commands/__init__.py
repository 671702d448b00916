"""The command line's commands and the parts their parsers share.

Command modules: :mod:`~chainyard.commands.sample` (``sample``),
:mod:`~chainyard.commands.decisions` (``decide``, ``derive``, ``diagnose``),
:mod:`~chainyard.commands.configuration` (``check``, ``schema``) and
:mod:`~chainyard.commands.results` (``export``, ``results-table``, ``plot``: the results of a
run, joining analysis and report). Shared: :mod:`~chainyard.commands.parsing` (the parser
class, argument types, ``--version``) and :mod:`~chainyard.commands.exits` (the line and exit
status of an error that escaped a command). :mod:`chainyard.cli` assembles them.

Each module declares its parsers cheaply; the work is imported when a command runs.
"""
