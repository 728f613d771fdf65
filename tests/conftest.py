import sys
from pathlib import Path

# tests/systems.py and data_demo/ are importable from the tests.
sys.path.insert(0, str(Path(__file__).resolve().parent))
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
