"""The data layer: read the observation CSV, map columns, convert units, validate, build the leaf table."""
from .dataset import Dataset
from .reading import load_dataset

__all__ = ["Dataset", "load_dataset"]
