"""Regenerate the bundled demo field (the invented Tarnwick field) from its seed.

    python demo_data/make_demo.py [FOLDER]

writes wells.csv, seismic.csv, seismic.nc and truth.nc (truth is for experiments and tests
only: a real study never has it).
"""

import sys
from pathlib import Path

from predictor.synthetic import FieldSpec, demo_files

if __name__ == "__main__":
    folder = Path(sys.argv[1]) if len(sys.argv) > 1 else Path(__file__).parent
    for name, path in demo_files(folder, FieldSpec()).items():
        print(f"{name}: {path}")
