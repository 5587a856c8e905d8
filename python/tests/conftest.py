import os
import sys

# pytester runs pytest inside these tests (test_plugin.py).
pytest_plugins = ["pytester"]

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
