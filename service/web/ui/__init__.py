"""The operations web view under ``/ui/``: sign in with an API key, the network map and table,
the live alert list with acknowledgement, and one detector's day. Server-built HTML and inline
SVG; nothing is fetched from another host."""

from service.web.ui.pages import install

__all__ = ["install"]
