"""One module per command of ``tickscope``: each has ``run(args) -> int`` (the exit code).

:mod:`tickscope.cli` builds the parser and calls the chosen command's ``run``; the modules
here wire sources (:mod:`tickscope.io`) and sinks (:mod:`tickscope.ui`, the log) to the
pipeline.  :mod:`.common` holds what several commands share.
"""
