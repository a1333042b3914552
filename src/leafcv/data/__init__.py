"""The data layer: read the observation CSV (or a pandas DataFrame), check the column mapping
(`mapping.check_mapping`), convert units, validate, build the leaf table."""
from .dataset import Dataset
from .reading import load_dataset

__all__ = ["Dataset", "load_dataset"]
