"""predictor: facies, porosity and permeability maps between wells from seismic attributes.

The command line (``predictor``) is a thin shell over these functions.
"""

__version__ = "0.1.0"

from .bundle import Bundle, load_bundle, save_bundle  # noqa: E402
from .checks import check_data, check_files  # noqa: E402
from .chunked import predict_to_zarr  # noqa: E402
from .explanations import contribution_maps, explain_bundle, well_contributions  # noqa: E402
from .features import FeatureSpec  # noqa: E402
from .grid import read_grid, read_seismic, sample_at  # noqa: E402
from .intervals import IntervalCalibration  # noqa: E402
from .io.tables import read_wells  # noqa: E402
from .predict import predict_maps, write_maps  # noqa: E402
from .report import build_report  # noqa: E402
from .training import TargetModel, TrainedModels, TrainOptions, train  # noqa: E402
from .volume import read_volume, sample_volume  # noqa: E402

__all__ = [
    "Bundle",
    "FeatureSpec",
    "IntervalCalibration",
    "TargetModel",
    "TrainOptions",
    "TrainedModels",
    "build_report",
    "check_data",
    "check_files",
    "contribution_maps",
    "explain_bundle",
    "load_bundle",
    "predict_maps",
    "predict_to_zarr",
    "read_grid",
    "read_seismic",
    "read_volume",
    "read_wells",
    "sample_at",
    "sample_volume",
    "save_bundle",
    "train",
    "well_contributions",
    "write_maps",
    "__version__",
]
