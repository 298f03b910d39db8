"""tickscope: time a ticking movement by ear, to microseconds.

API map
-------
* :class:`tickscope.pipeline.Analyzer` - blocks of audio in (:class:`tickscope.model.Block`), decided
  events out as they come, and :meth:`~tickscope.pipeline.Analyzer.summary` /
  :meth:`~tickscope.pipeline.Analyzer.finish`: a :class:`tickscope.model.Summary`.
* :func:`tickscope.export.summary_to_dict` - the Summary as the JSON object of ``analyze --json``.
* :mod:`tickscope.core` - the pure analysis: :mod:`~.core.detect` (:class:`ImpactDetector`),
  :mod:`~.core.acquire` (:func:`find_grid`), :mod:`~.core.grid` (:class:`StepTracker`),
  :mod:`~.core.timing` (templates, sub-sample matching, the Cramér-Rao bound), :mod:`~.core.rate`
  (:func:`fit_rate`), :mod:`~.core.ringdown` (:func:`measure_ringdown`), :mod:`~.core.soundkind`
  (:func:`classify_sound`), :mod:`~.core.diagnose` (:func:`diagnose` -> :class:`~tickscope.model.Diagnosis`),
  :mod:`~.core.stability` (TIE, Allan deviation), :mod:`~.core.clockfit` (the device clock),
  :mod:`~.core.simulate` (the movement simulator: :class:`Scenario`, :class:`Renderer`),
  :mod:`~.core.escapement` (:func:`escapement_figures`: beat rate, asymmetry, amplitude),
  :mod:`~.core.beatsounds` (the sounds within a beat), :mod:`~.core.escapesim` (the escapement
  simulator: :class:`EscapementScenario`).
* :mod:`tickscope.advice` - the plain-words notes and reading built from the figures.
* :mod:`tickscope.io` - audio files, live capture, the log database, clock profiles.
* :mod:`tickscope.ui` - the terminal report, live screens and plots.

Importing tickscope does no work and imports no audio, terminal or plotting library.
"""
__version__ = "0.1.0"
