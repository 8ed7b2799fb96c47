"""The operations web view under ``/ui/``: sign in with an API key, the network map and table,
the live alert list with acknowledgement, one detector's day, and its planners' figures.
Server-built HTML and inline SVG; nothing is fetched from another host."""

from typing import Any

from service.web.ui import pages, planning


def install(app: Any) -> None:
    """Add the view to the app (see :func:`service.web.ui.pages.install`) with the figures
    page."""
    app.include_router(planning.router)
    pages.install(app)


__all__ = ["install"]
