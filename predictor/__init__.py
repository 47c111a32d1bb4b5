"""predictor: facies, porosity and permeability maps between wells from seismic attributes."""

__version__ = "0.1.0"
