"""Storage: the embedded tiled store and access to catalogs."""

from ._embedded import EmbeddedStore, close_catalog, open_catalog

__all__ = ["EmbeddedStore", "close_catalog", "open_catalog"]
