"""MQTT topic layout of shadow (pure: builds, parses and validates topic names; no sockets).

Every robot publishes on its own topics::

    <prefix>/v1/<site>/<cell>/<robot>/samples   sample batches (shadow.ingest.wire, JSON or binary)
    <prefix>/v1/<site>/<cell>/<robot>/status    the publisher's online/offline state (retained, last will)

``prefix`` is one to four levels (default ``shadow``); ``v1`` is the wire-format version. Site, cell and
robot are in the topic so a broker ACL can let each controller (or edge gateway) write only its own
robot's two topics, while the shadow service reads ``<prefix>/v1/+/+/+/samples``. Each level is 1-64
characters of ``A-Z a-z 0-9 . _ -`` starting with a letter or digit: no MQTT wildcards (``+ #``), no ``/``,
no leading ``$`` (reserved for broker topics), no spaces or control characters.
"""

from __future__ import annotations

import enum
from collections.abc import Mapping
from dataclasses import dataclass

from shadow.errors import RejectedMessageError
from shadow.ingest.wire import ROBOT_ID_PATTERN

__all__ = [
    "DEFAULT_PREFIX",
    "MAX_PREFIX_LEVELS",
    "MAX_TOPIC_LENGTH",
    "TOPIC_VERSION",
    "RobotAddress",
    "TopicKind",
    "TopicLayout",
    "check_sender",
    "validate_segment",
]

DEFAULT_PREFIX = "shadow"
TOPIC_VERSION = "v1"
MAX_PREFIX_LEVELS = 4
MAX_TOPIC_LENGTH = 512  # our own cap; 4 prefix levels + 5 levels of <= 64 characters fit well within it


class TopicKind(enum.Enum):
    """Last level of a robot's topic."""

    SAMPLES = "samples"
    STATUS = "status"


def validate_segment(name: str, value: object) -> str:
    """Return ``value`` if it is a valid topic level, else raise ``RejectedMessageError`` (``bad_topic``).

    >>> validate_segment("site", "plant-7")
    'plant-7'
    >>> validate_segment("cell", "cell/2")  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    shadow.errors.RejectedMessageError: bad_topic: cell: 'cell/2' must be 1-64 of A-Z a-z 0-9 . _ - ...
    """
    if not isinstance(value, str) or ROBOT_ID_PATTERN.fullmatch(value) is None:
        raise RejectedMessageError(
            "bad_topic", f"{name}: {value!r} must be 1-64 of A-Z a-z 0-9 . _ - and start with a letter or digit"
        )
    return value


@dataclass(frozen=True, slots=True)
class RobotAddress:
    """Where a robot lives: site (plant), cell (line or work cell) and robot id, each a valid topic level.

    The robot id is the one its messages carry in their ``robot`` field.
    """

    site: str
    cell: str
    robot: str

    def __post_init__(self) -> None:
        validate_segment("site", self.site)
        validate_segment("cell", self.cell)
        validate_segment("robot", self.robot)

    def __str__(self) -> str:
        return f"{self.site}/{self.cell}/{self.robot}"


def check_sender(address: RobotAddress, robot_id: str) -> None:
    """Raise ``RejectedMessageError`` (``robot_mismatch``) unless a message on ``address``'s topic names
    the same robot: a controller must not speak for another robot even if the ACL lets it through."""
    if robot_id != address.robot:
        raise RejectedMessageError(
            "robot_mismatch", f"robot: message says {robot_id!r} but was published on the topic of {address}"
        )


@dataclass(frozen=True, slots=True)
class TopicLayout:
    """Builds and parses the topics under one prefix (``"shadow"`` or e.g. ``"acme/plant7/shadow"``)."""

    prefix: str = DEFAULT_PREFIX

    def __post_init__(self) -> None:
        levels = self.prefix.split("/") if isinstance(self.prefix, str) else [self.prefix]
        if not 1 <= len(levels) <= MAX_PREFIX_LEVELS:
            raise RejectedMessageError("bad_topic", f"prefix: {len(levels)} levels, expected 1 to {MAX_PREFIX_LEVELS}")
        for level in levels:
            validate_segment("prefix", level)

    @property
    def _levels(self) -> list[str]:
        return self.prefix.split("/")

    def topic(self, address: RobotAddress, kind: TopicKind) -> str:
        """The topic of ``address`` for ``kind``."""
        return f"{self.prefix}/{TOPIC_VERSION}/{address.site}/{address.cell}/{address.robot}/{kind.value}"

    def samples_topic(self, address: RobotAddress) -> str:
        """``<prefix>/v1/<site>/<cell>/<robot>/samples``."""
        return self.topic(address, TopicKind.SAMPLES)

    def status_topic(self, address: RobotAddress) -> str:
        """``<prefix>/v1/<site>/<cell>/<robot>/status``."""
        return self.topic(address, TopicKind.STATUS)

    def publisher_topics(self, address: RobotAddress) -> tuple[str, str]:
        """The only two topics the controller of ``address`` needs to write."""
        return self.samples_topic(address), self.status_topic(address)

    def subscription(
        self,
        kind: TopicKind = TopicKind.SAMPLES,
        *,
        site: str | None = None,
        cell: str | None = None,
        robot: str | None = None,
    ) -> str:
        """A subscription filter: ``+`` for each of site, cell, robot left as None.

        >>> TopicLayout().subscription(site="plant-7")
        'shadow/v1/plant-7/+/+/samples'
        """
        parts = [
            "+" if value is None else validate_segment(name, value)
            for name, value in (("site", site), ("cell", cell), ("robot", robot))
        ]
        return "/".join([self.prefix, TOPIC_VERSION, *parts, kind.value])

    def parse(self, topic: str) -> tuple[RobotAddress, TopicKind]:
        """Split a received topic into its address and kind; ``RejectedMessageError`` (``bad_topic`` or
        ``bad_version``) names what is wrong.

        >>> TopicLayout().parse("shadow/v1/plant-7/cell-2/delta-01/samples")
        (RobotAddress(site='plant-7', cell='cell-2', robot='delta-01'), <TopicKind.SAMPLES: 'samples'>)
        """
        if not isinstance(topic, str):
            raise RejectedMessageError("bad_topic", f"topic: expected a string, got {type(topic).__name__}")
        if len(topic) > MAX_TOPIC_LENGTH:
            raise RejectedMessageError("bad_topic", f"topic: {len(topic)} characters, the limit is {MAX_TOPIC_LENGTH}")
        levels = topic.split("/")
        prefix = self._levels
        if len(levels) != len(prefix) + 5 or levels[: len(prefix)] != prefix:
            raise RejectedMessageError(
                "bad_topic", f"topic: {topic[:120]!r} is not <{self.prefix}>/v1/<site>/<cell>/<robot>/<kind>"
            )
        version, site, cell, robot, kind_text = levels[len(prefix) :]
        if version != TOPIC_VERSION:
            raise RejectedMessageError("bad_version", f"topic: version level {version[:20]!r}, this reader: 'v1'")
        try:
            kind = TopicKind(kind_text)
        except ValueError:
            raise RejectedMessageError(
                "bad_topic", f"topic: last level {kind_text[:20]!r} is not 'samples' or 'status'"
            ) from None
        return RobotAddress(site, cell, robot), kind

    def mosquitto_acl(self, publishers: Mapping[str, RobotAddress], *, service_user: str) -> str:
        """Text of a mosquitto ``acl_file``: ``service_user`` may read every robot's topics, each publisher
        user may write only its own robot's two topics (and read nothing).

        User names follow the topic-level rule, so no line of the file can be broken by them.
        """
        validate_segment("service_user", service_user)
        lines = [f"user {service_user}", f"topic read {self.prefix}/{TOPIC_VERSION}/#", ""]
        for user, address in sorted(publishers.items()):
            validate_segment("user", user)
            lines.append(f"user {user}")
            lines.extend(f"topic write {t}" for t in self.publisher_topics(address))
            lines.append("")
        return "\n".join(lines)
