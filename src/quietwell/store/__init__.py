"""Storage: the embedded tiled store and access to catalogs."""

from ._embedded import EmbeddedStore, open_catalog

__all__ = ["EmbeddedStore", "open_catalog"]
