"""The shard-inspection report: `patchloom inspect RECIPE --out DIR`.

One pass of the recipe's own Pipeline (the same per-sample chain and Packer as training) gives
the numbers; a seeded reservoir over the records read picks the samples drawn stage by stage.
Output is one index.html (inline CSS, no scripts, no network) with PNG files beside it. Charts
use matplotlib (the `report` extra), imported only when a report is built.
"""

from __future__ import annotations

from .build import build_report, format_summary
from .command import add_inspect_command, cmd_inspect

__all__ = ["add_inspect_command", "build_report", "cmd_inspect", "format_summary"]
