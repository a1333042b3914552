"""leafcv: compare hierarchical FvCB structures by how well they predict a new leaf."""
__version__ = "0.1.0"
