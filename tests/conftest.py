import sys
from pathlib import Path

# Test-support environments (tests/support) are importable as `support.<module>`.
sys.path.insert(0, str(Path(__file__).parent))
