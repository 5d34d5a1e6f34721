"""Helpers for the deployment tests (tests/deploy): replica processes, nginx, a bounded load,
and readers for the files in deploy/ (Dockerfile stages, manifests).

Named ``scaleout`` (not ``deploy`` or ``service``) so it cannot shadow a real package.
"""

__all__: list[str] = []
