"""Running stages as Dask tasks: :func:`bigprune.cluster.connect.cluster` opens a client, and
:func:`bigprune.cluster.tasks.run_tasks` maps one function over a stage's pieces of work."""
