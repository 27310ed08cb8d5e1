"""The energy-budget job: what a device built from the sample would cost, per posterior draw.

* :mod:`~polkit.jobs.budget.run` -- :func:`~polkit.jobs.budget.run.energy_budget`, the job;
* :mod:`~polkit.jobs.budget.inputs` -- reading the dispersion and power results, checking
  they belong together;
* :mod:`~polkit.jobs.budget.propagate` -- pairing the draws and computing every quantity
  per draw;
* :mod:`~polkit.jobs.budget.claims` -- claims such as ``"energy_per_operation < 10 fJ"``;
* :mod:`~polkit.jobs.budget.result` -- :class:`~polkit.jobs.budget.result.BudgetResult`.

The device file is read by :func:`polkit.config.device.load_device`; the physics is in
:mod:`polkit.models.device_energy`.
"""
