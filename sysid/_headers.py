"""Column-header syntax shared by the session tables, stimulation patterns and schedules.

``time [s]`` (optionally ``time [s] @ <rate> Hz``) names the time column; ``in:<name> [<unit>]`` and
``out:<name> [<unit>]`` name channels. The README's "CSV and Parquet table layout" documents the syntax.
"""

import re

TIME_RE = re.compile(r"^\s*time\s*\[s\]\s*(?:@\s*(?P<rate>\S+)\s*Hz)?\s*$")
CHANNEL_RE = re.compile(r"^\s*(?P<role>in|out)\s*:\s*(?P<name>[^\[\]]*?)\s*\[(?P<unit>[^\[\]]*)\]\s*$")
