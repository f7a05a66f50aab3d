"""An invented fleet and a physics-based generator of its test history (see README.md).

Example::

    import demo_fleet
    demo = demo_fleet.build(as_of=datetime.date(2025, 6, 30), seed=42)
    demo.write_csv(Path("demo"))
"""

from demo_fleet.catalogue import COMPANY, FAMILIES, SITES
from demo_fleet.generator import DemoFleet, build
from demo_fleet.stories import Story

__all__ = ["COMPANY", "FAMILIES", "SITES", "DemoFleet", "Story", "build"]
