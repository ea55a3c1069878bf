"""The training service: ``align serve`` and ``align jobs``.

Modules, one concern each:

- ``home``       the service home folder (layout, settings, the access token)
- ``security``   token check, host check, request body limit, path confinement
- ``store``      the durable SQLite (WAL) job store
- ``spec``       turning a submitted job into a validated, path-confined job spec
- ``worker``     the worker process that runs jobs (train -> evaluate -> export -> index)
- ``launch``     a job's training as ``align train`` under torchrun (devices, stop request, progress)
- ``supervisor`` starting, watching and stopping the worker processes from the service
- ``search``     loaded exports and gallery indexes answering embed and search calls
- ``page``       the status page (plain HTML and a little JavaScript)
- ``app``        the FastAPI routes and ``serve()``
- ``client``     the HTTP client ``align jobs`` uses
"""
