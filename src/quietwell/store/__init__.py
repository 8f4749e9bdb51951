"""Storage: the embedded tiled store, the lab's catalog server, and access to catalogs."""

from ._embedded import EmbeddedStore, close_catalog, open_catalog
from ._server import CatalogServerError, ServerStore, explain_http_error, open_store

__all__ = ["CatalogServerError", "EmbeddedStore", "ServerStore", "close_catalog",
           "explain_http_error", "open_catalog", "open_store"]
