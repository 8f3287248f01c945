"""Regenerate the repeated demo survey files in this folder (deterministic; see README.md).

Usage: python data_demo/resurvey/make_resurvey.py [FOLDER]   (default: the folder of this script)
"""

import sys
from pathlib import Path

from spatial_ev.datasets.resurvey import write_resurvey

if __name__ == "__main__":
    folder = Path(sys.argv[1]) if len(sys.argv) > 1 else Path(__file__).resolve().parent
    for role, path in write_resurvey(folder).items():
        print(f"{role}: {path}")
