"""The dashboard's durable work: images and the maps made from them (kept in the audit store),
how to read a map and a job (units, flat maps), and what a map's checks will cost."""

from pellucid.core.workbench.durable import StoredImage, StoredMap, Workbench

__all__ = ["StoredImage", "StoredMap", "Workbench"]
