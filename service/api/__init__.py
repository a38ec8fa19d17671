"""The HTTP service (FastAPI, run by uvicorn): scoring endpoints, request and response bodies,
API keys, problem details, metrics, the prediction-log writer, the registry of served bundles and
their swap without a restart, settings. The only subpackage that imports ``fastapi``,
``starlette`` or ``uvicorn``.

May import: errors, files, spec, features, bundle, explain, actions.
"""
