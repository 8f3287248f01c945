"""Regenerate the river survey files in this folder (deterministic; see README.md).

Usage: python data_demo/river/make_river_survey.py [FOLDER]   (default: the folder of this script)
"""

import sys
from pathlib import Path

from spatial_ev.datasets.river import write_river_survey

if __name__ == "__main__":
    folder = Path(sys.argv[1]) if len(sys.argv) > 1 else Path(__file__).resolve().parent
    for role, path in write_river_survey(folder).items():
        print(f"{role}: {path}")
