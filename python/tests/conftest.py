"""Makes the package in python/ importable for its tests, whatever the working directory."""
import os
import sys

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), ".."))
