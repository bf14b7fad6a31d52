"""Shared test set-up: the repository's tests/ folder is importable (rooms helper)."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).parent))
