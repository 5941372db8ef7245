"""absolve's chunked path from files to files, run as its own process by run_all.py::

    python stream_quantify.py SCANS.csv LIBRARY.json OUT_FOLDER [CHUNK_SCANS]

Reads the scans, quantifies them with :func:`absolve.quantify.quantify_chunks` and writes
results.csv, fit.csv, fitted.csv, residuals.csv and results.json with
:func:`absolve.io.results.write_results_in_chunks`, so that only one chunk's spectra are held at a
time. It is what ``absolve quantify`` does without the report, through the bounded-memory API.
"""

from __future__ import annotations

import sys
from pathlib import Path

from absolve.io.library_file import read_library
from absolve.io.results import STREAMED_FILES, write_results_in_chunks
from absolve.io.tables import read_scans
from absolve.quantify import quantify_chunks


def main(scans: str, library_path: str, out: str, chunk_scans: int = 4096) -> None:
    spectra = read_scans([scans])
    library = read_library(library_path)
    folder = Path(out)
    targets = {name: folder / name for name in STREAMED_FILES}
    write_results_in_chunks(quantify_chunks(spectra, library, chunk_scans=chunk_scans), targets, provenance={"inputs": [scans, library_path]}, force=True)


if __name__ == "__main__":
    main(sys.argv[1], sys.argv[2], sys.argv[3], *(int(value) for value in sys.argv[4:5]))
