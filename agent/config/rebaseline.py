"""The `rebaseline:` section's settings and the re-learning limits (values only).

`agent.config.load` reads the section (`parse_rebaseline`); this module holds what it
builds and the defaults, free of the reader, numpy and the bundle code, so that
agent/learning and agent/models.store can import them and the config loads without them.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

# The re-learning defaults, here rather than in agent.learning.rebaseline /
# agent.models.store (which import them from here): those modules bring numpy and the
# bundle code, and the config must load without them (the ingest child unpickles it).
# Defaults (common practice, no source): a shift of 10x the raise threshold is far
# beyond normal scatter (normal medians sit near 0.2-0.4 of the threshold). A 0.995
# quantile x 1.25 margin puts well under 1 % of fresh normal windows above threshold,
# but the held-out test part has only some 40-60 windows, where one window is 2 %: a
# budget of 5 % tolerates two stray windows and still rejects a model that does not fit
# (the old model sits at 100 % on the new normal). A rehearsal score 1.5x the old is a
# model that has started to forget.
DEFAULT_MAX_SHIFT = 10.0
DEFAULT_FALSE_ALARM_BUDGET = 0.05
DEFAULT_REHEARSAL_TOLERANCE = 1.5
DEFAULT_REHEARSAL_SIZE = 512
MIN_NEW_WINDOWS = 60
DEFAULT_KEEP = 5

KEYS = ("enabled", "admin_socket", "models_dir", "windows", "false_alarm_budget",
        "rehearsal_size", "rehearsal_tolerance", "max_shift", "versions_kept", "mqtt_commands",
        "broker_enforces_acl")
DEFAULT_WINDOWS = 360  # 30 minutes of 5 s windows: long enough to see a duty cycle
# The most windows one rebaseline may collect (config, admin socket, MQTT commands): a
# day of 5 s windows, a whole daily duty cycle. Anomaly events of a learning asset are
# held back, so a longer learning keeps an asset's alarms (below the guard) quiet for
# more than a day; the windows are kept in memory meanwhile (~0.5 KB each). Common
# practice, no source.
MAX_WINDOWS = 17_280
# The learning guard (agent/learning/manager.py): an anomaly at FAR_FACTOR x max_shift x the
# threshold during learning is published and ends learning. 3: well past where the
# verdict would refuse the new normal (max_shift on the median), so a bumpy but real
# new normal does not trip it. Common practice, no source.
FAR_FACTOR = 3.0


@dataclass(frozen=True)
class RebaselineConfig:
    """Settings of re-learning on the gateway (see config/example.yaml)."""

    admin_socket: Path
    models_dir: Path
    enabled: bool = True
    windows: int = DEFAULT_WINDOWS
    false_alarm_budget: float = DEFAULT_FALSE_ALARM_BUDGET
    rehearsal_size: int = DEFAULT_REHEARSAL_SIZE
    rehearsal_tolerance: float = DEFAULT_REHEARSAL_TOLERANCE
    max_shift: float = DEFAULT_MAX_SHIFT
    versions_kept: int = DEFAULT_KEEP
    # `<prefix>/commands/<asset>/rebaseline` on the upstream broker (agent/learning/commands.py)
    mqtt_commands: bool = False
    # The operator's statement that the upstream broker's ACL lets only trusted users
    # publish on `<prefix>/commands/#` (README); required for `mqtt_commands`.
    broker_enforces_acl: bool = False

    @classmethod
    def defaults(cls, state_dir: Path) -> RebaselineConfig:
        return cls(admin_socket=state_dir / "admin.sock", models_dir=state_dir / "models")
