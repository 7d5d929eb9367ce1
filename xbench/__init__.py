"""xbench: faithfulness benchmarks for explanations of multispectral tile classifiers."""

__version__ = "0.1.0"
