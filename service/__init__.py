"""rbfgate's HTTP scoring service (FastAPI + uvicorn), built on ``model_store``.

    service.app.create_app(settings)     the ASGI app (see service.app)
    rbfgate serve --store DIR            run it (see service.commands)

The package imports nothing at the top level: ``service.commands`` is loaded
by every ``rbfgate`` command through the ``rbfgate.commands`` entry point and
must stay light. ``model_store`` never imports this package.
"""

__all__: list[str] = []
