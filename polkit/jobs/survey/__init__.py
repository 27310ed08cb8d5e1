"""The wafer survey: every measured position of a wafer fitted, then mapped.

Where things are:

- :mod:`polkit.config.manifest`: the manifest (which map was measured where);
  :mod:`.folders`: positions from a folder of maps instead.
- :mod:`.run`: :func:`~polkit.jobs.survey.run.run_survey`, the whole survey.
- :mod:`.state`: the survey's books and root seed; :mod:`.layout`: its output folder.
- :mod:`.tasks`: one position (the task a dask worker runs); :mod:`.scheduler`: the dask
  client and the submission of the tasks.
- :mod:`.result`: the combined table and :class:`~polkit.jobs.survey.result.SurveyResult`;
  :mod:`.surface`: the detuning surface and its zero line.
"""
