"""What the commands do, as functions: run a scenario, compare schemes, write the output folder.

====================================  ===============================================================
:mod:`~fieldplan.workflows.compare`   :func:`run_scenario` (plan or replay, simulate the trials) and
                                      :func:`compare` (scenarios × variants × seeds on an Executor)
:mod:`~fieldplan.workflows.export`    :func:`write_outputs`: the output folder of a run (schedule, trajectories,
                                      summary, the figures :data:`fieldplan.plots.RUN_FIGURES` lists)
:mod:`~fieldplan.workflows.inspect`   :func:`inspect_scenario`: steerability, speed maps and count curves of a scenario
====================================  ===============================================================

Every folder is written through :func:`fieldplan.fileio.output_folder`; ``fieldplan.cli`` only
parses arguments and prints.
"""
