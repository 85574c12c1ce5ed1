"""Nodal (bus-by-bus) DC grids: sparse flows and PTDF rows, and importers of open case formats
into nodal case folders."""

from .sparse import Grid, GridError

__all__ = ["Grid", "GridError"]
