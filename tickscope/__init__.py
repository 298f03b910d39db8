"""tickscope: time a stepping-motor movement by ear, to microseconds.

API map
-------
* :mod:`tickscope.core.simulate` - the movement simulator (:class:`Scenario`, :class:`Renderer`).
* :mod:`tickscope.core.detect` - the streaming step detector (:class:`StepDetector`).
* :mod:`tickscope.core.timing` - rate fit with an honest interval.
* :mod:`tickscope.core.ringdown` - ring-down decay time of one step.
* :mod:`tickscope.pipeline` - :class:`Analyzer`: blocks in, summary out.

Importing tickscope does no work and imports no audio, terminal or plotting library.
"""
__version__ = "0.1.0"
