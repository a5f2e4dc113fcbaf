"""Make the campaign package (``reliability/`` at the repository root) importable however pytest
is started (``python -m pytest`` adds the working directory, the ``pytest`` script does not)."""
import sys
from pathlib import Path

ROOT = str(Path(__file__).resolve().parents[2])
if ROOT not in sys.path:
    sys.path.insert(0, ROOT)
