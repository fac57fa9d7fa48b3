"""The `rebaseline:` section of the config (read by `agent.config.load.parse_config`).

Kept apart from config.py so the loader only calls `parse_rebaseline`; it takes the
loader's reader (`mapping`, `get`, `path`, `bad`) so problems are reported with the
others, at their key paths.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from agent.config.load import BrokerConfig

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


def parse_rebaseline(r: Any, node: Any, path: str, state_dir: Path) -> RebaselineConfig:
    """Read the section at `path` with the loader's reader `r`; defaults for what is unset."""
    d = r.mapping(node, path, KEYS)
    sock = r.path(r.get(d, "admin_socket", path, "str", None), f"{path}.admin_socket") \
        or state_dir / "admin.sock"
    if len(str(sock).encode()) > 107:  # sun_path holds 108 bytes with the final NUL
        r.bad(f"{path}.admin_socket", "a path of at most 107 bytes (a unix socket limit)",
              str(sock))
    return RebaselineConfig(
        admin_socket=sock,
        models_dir=r.path(r.get(d, "models_dir", path, "str", None), f"{path}.models_dir")
        or state_dir / "models",
        enabled=r.get(d, "enabled", path, "bool", True),
        windows=r.get(d, "windows", path, "int", DEFAULT_WINDOWS,
                      lambda v: MIN_NEW_WINDOWS <= v <= MAX_WINDOWS,
                      f"an integer from {MIN_NEW_WINDOWS} to {MAX_WINDOWS}"),
        false_alarm_budget=r.get(d, "false_alarm_budget", path, "num",
                                 DEFAULT_FALSE_ALARM_BUDGET, lambda v: 0 <= v < 1,
                                 "a fraction in [0, 1)"),
        rehearsal_size=r.get(d, "rehearsal_size", path, "int", DEFAULT_REHEARSAL_SIZE,
                             lambda v: 16 <= v <= 100_000, "an integer from 16 to 100000"),
        rehearsal_tolerance=r.get(d, "rehearsal_tolerance", path, "num",
                                  DEFAULT_REHEARSAL_TOLERANCE, lambda v: v >= 1,
                                  "a ratio >= 1"),
        max_shift=r.get(d, "max_shift", path, "num", DEFAULT_MAX_SHIFT, lambda v: v > 0,
                        "a ratio > 0 (median old-model score of the new windows / threshold)"),
        versions_kept=r.get(d, "versions_kept", path, "int", DEFAULT_KEEP,
                            lambda v: 2 <= v <= 100, "an integer from 2 to 100"),
        mqtt_commands=r.get(d, "mqtt_commands", path, "bool", False),
        broker_enforces_acl=r.get(d, "broker_enforces_acl", path, "bool", False),
    )


def check_mqtt_commands(r: Any, rb: RebaselineConfig, upstream: BrokerConfig,
                        path: str = "rebaseline") -> None:
    """MQTT commands only over an authenticated upstream connection, and only when the
    operator states that the broker enforces access (`broker_enforces_acl`).

    The daemon cannot see who published a message: it relies on the broker's access
    control, which needs to know the gateway (a username or a TLS client certificate)
    to grant it the commands topic while others are kept from publishing there.
    """
    tls_cert = upstream.tls is not None and upstream.tls.cert_file is not None
    if rb.mqtt_commands and not upstream.username and not tls_cert:
        r.bad(f"{path}.mqtt_commands", "false unless upstream_broker authenticates (a "
              "username or tls.cert_file): the broker's ACL must decide who may publish "
              "commands", True)
    elif rb.mqtt_commands and not rb.broker_enforces_acl:
        # A username says who the gateway is, not that the broker keeps anyone else
        # off the commands topic (a broker with allow_anonymous true takes any command).
        r.bad(f"{path}.mqtt_commands", f"false unless {path}.broker_enforces_acl is true "
              "(the operator's statement that the upstream broker refuses anonymous "
              "clients and its ACL lets only trusted users publish on "
              "<topic_prefix>/commands/#; see README, MQTT commands)", True)
