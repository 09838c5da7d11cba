"""Write the elements of a results file with M, H, B and body_id as a VTK file.

    python viz/export_vtu.py RESULTS.h5 OUT.vtu
"""
import sys

from volmag.export import write_vtu
from volmag.results import read_results

if __name__ == "__main__":
    if len(sys.argv) != 3:
        sys.exit(__doc__)
    print(write_vtu(read_results(sys.argv[1]), sys.argv[2]))
