"""Web pages for seeing the results, served by the service app under ``/ui``.

``mount_ui(app, settings)`` mounts them; :func:`service.app.create_app` calls it. Pages are
rendered on the server (Jinja2 templates, matplotlib figures); the only scripts are two small
files of our own (table sorting, training progress).
"""

from .site import mount_ui

__all__ = ["mount_ui"]
