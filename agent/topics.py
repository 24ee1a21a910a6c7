"""MQTT topic names: the one place where topic strings are built and parsed.

Public API
----------
- :class:`Topics` ``(prefix, site, agent)``: the topics of one agent.

  - ``.status`` -> ``<prefix>/<site>/<agent>/status`` (retained; last will)
  - ``.result(point)`` -> ``<prefix>/<site>/<agent>/points/<point>/result``
  - ``.alert(point)`` -> ``.../points/<point>/alert`` (retained, current state)
  - ``.spectrum(point)`` -> ``.../points/<point>/spectrum``
  - ``.point(point, kind)`` -> any of the three above by kind name

- :func:`subscription(prefix, site="+", agent="+", kind=None)` -> the
  wildcard filter a dashboard subscribes to (every status and point message
  below the prefix, or one kind only).
- :func:`parse(prefix, topic)` -> :class:`TopicParts` (site, agent, point,
  kind), or ``None`` for a topic that is not one of ours.
- :func:`check_level(name, value)` -> ``value``; ValueError naming the value
  when it cannot be one topic level.
- ``POINT_KINDS`` = ("result", "alert", "spectrum").

Notes
-----
Every level that comes from configuration (prefix, site, agent, point) is
checked: it must be a non-empty string without ``/`` (the level separator),
``+`` or ``#`` (the wildcards), NUL, or white space, and the prefix must not
start with ``$`` (reserved for broker topics such as ``$SYS``).  A whole
topic must fit the 65535-byte UTF-8 string limit of MQTT.

References
----------
.. [1] OASIS, "MQTT Version 5.0", 2019, section 4.7 (topic names and filters).
.. [2] OASIS, "MQTT Version 3.1.1", 2014, section 4.7.
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["Topics", "TopicParts", "POINT_KINDS", "subscription", "parse", "check_level"]

POINT_KINDS = ("result", "alert", "spectrum")
_STATUS = "status"
_POINTS = "points"
_FORBIDDEN = frozenset("/+#\0 \t\r\n")
_MAX_TOPIC_BYTES = 65535


def check_level(name, value):
    """Check that ``value`` can be one MQTT topic level.

    Parameters
    ----------
    name : str
        What the value is (used in the error message), e.g. ``"site"``.
    value : str
        The candidate level.

    Returns
    -------
    str
        ``value`` unchanged.

    Raises
    ------
    ValueError
        When ``value`` is not a string, is empty, or contains ``/``, ``+``,
        ``#``, NUL or white space.
    """
    if not isinstance(value, str):
        raise ValueError(f"{name}={value!r} must be a string")
    if not value:
        raise ValueError(f"{name}={value!r} must not be empty (it is an MQTT topic level)")
    bad = sorted(set(value) & _FORBIDDEN)
    if bad:
        raise ValueError(f"{name}={value!r} must not contain {bad!r} "
                         f"(it is one MQTT topic level; '/', '+', '#' and white space are not allowed)")
    return value


def _check_prefix(prefix):
    check_level("prefix", prefix)
    if prefix.startswith("$"):
        raise ValueError(f"prefix={prefix!r} must not start with '$' (reserved for broker topics)")
    return prefix


def _join(*levels):
    topic = "/".join(levels)
    if len(topic.encode("utf-8")) > _MAX_TOPIC_BYTES:
        raise ValueError(f"topic of {len(topic.encode('utf-8'))} bytes is longer than the MQTT "
                         f"limit of {_MAX_TOPIC_BYTES} bytes")
    return topic


@dataclass(frozen=True)
class Topics:
    """The topics of one agent.

    Parameters
    ----------
    prefix : str
        First level of every topic (``broker.topic_prefix``).
    site : str
        Site name (``agent.site``).
    agent : str
        Agent name (``agent.name``).

    Raises
    ------
    ValueError
        When a level is empty or contains ``/``, ``+``, ``#`` or white space.
    """

    prefix: str
    site: str
    agent: str

    def __post_init__(self):
        _check_prefix(self.prefix)
        check_level("site", self.site)
        check_level("agent", self.agent)

    @property
    def base(self):
        """``<prefix>/<site>/<agent>``."""
        return _join(self.prefix, self.site, self.agent)

    @property
    def status(self):
        """The retained status topic (also the last-will topic)."""
        return _join(self.prefix, self.site, self.agent, _STATUS)

    def point(self, point, kind):
        """Topic of a point message of ``kind`` (one of ``POINT_KINDS``)."""
        if kind not in POINT_KINDS:
            raise ValueError(f"kind={kind!r} must be one of {POINT_KINDS!r}")
        check_level("point", point)
        return _join(self.prefix, self.site, self.agent, _POINTS, point, kind)

    def result(self, point):
        """Topic of the per-capture results of ``point``."""
        return self.point(point, "result")

    def alert(self, point):
        """Topic of the (retained) alert state of ``point``."""
        return self.point(point, "alert")

    def spectrum(self, point):
        """Topic of the envelope-spectrum snapshots of ``point``."""
        return self.point(point, "spectrum")

    def for_kind(self, kind, point=None):
        """Topic of a message of ``kind``: ``"status"`` or one of ``POINT_KINDS``.

        ``point`` is required for point kinds and refused for ``"status"``.
        """
        if kind == _STATUS:
            if point is not None:
                raise ValueError(f"point={point!r} must be None for kind='status'")
            return self.status
        if point is None:
            raise ValueError(f"point must be given for kind={kind!r}")
        return self.point(point, kind)


def subscription(prefix, site="+", agent="+", kind=None):
    """The topic filter a dashboard subscribes to.

    Parameters
    ----------
    prefix : str
        ``broker.topic_prefix``.
    site, agent : str, optional
        A name to narrow the filter to one site / agent, or ``"+"`` (any).
    kind : str, optional
        None (default) for every status and point message; ``"status"`` or
        one of ``POINT_KINDS`` for that kind only (of every point).

    Returns
    -------
    str
        ``<prefix>/<site>/<agent>/#`` (the multi-level wildcard also matches
        the parent level, so status and points are both covered), or
        ``<prefix>/<site>/<agent>/status``, or
        ``<prefix>/<site>/<agent>/points/+/<kind>``.
    """
    _check_prefix(prefix)
    if site != "+":
        check_level("site", site)
    if agent != "+":
        check_level("agent", agent)
    if kind is None:
        return _join(prefix, site, agent, "#")
    if kind == _STATUS:
        return _join(prefix, site, agent, _STATUS)
    if kind not in POINT_KINDS:
        raise ValueError(f"kind={kind!r} must be None, 'status' or one of {POINT_KINDS!r}")
    return _join(prefix, site, agent, _POINTS, "+", kind)


@dataclass(frozen=True)
class TopicParts:
    """A topic of ours taken apart; ``point`` is None for status."""

    site: str
    agent: str
    kind: str
    point: str | None = None


def parse(prefix, topic):
    """Take a received topic apart.

    Parameters
    ----------
    prefix : str
        ``broker.topic_prefix``.
    topic : str
        A topic name as received.

    Returns
    -------
    TopicParts or None
        None when the topic is not a status or point topic below ``prefix``.
    """
    levels = topic.split("/")
    if not levels or levels[0] != prefix or any(not lv for lv in levels):
        return None
    if len(levels) == 4 and levels[3] == _STATUS:
        return TopicParts(site=levels[1], agent=levels[2], kind=_STATUS)
    if len(levels) == 6 and levels[3] == _POINTS and levels[5] in POINT_KINDS:
        return TopicParts(site=levels[1], agent=levels[2], kind=levels[5], point=levels[4])
    return None
