"""MQTT topic filters: the one validity check, wildcard matching and the topic -> tag router.

A topic filter is a topic whose levels (separated by ``/``) may be wildcards. The rules are
those of the MQTT Version 5.0 OASIS Standard (7 March 2019), the same in MQTT Version
3.1.1 (29 October 2014), section 4.7:

* ``#`` matches the parent level and any number of levels below it; it stands alone, as
  the whole filter or after a ``/``, and only as the last character (§4.7.1.2);
* ``+`` matches exactly one level, at any level, and occupies the whole level (§4.7.1.3);
* a filter starting with a wildcard does not match a topic starting with ``$`` (§4.7.2);
* a filter is at least one character long and holds no U+0000 (§4.7.3).

A shared subscription ``$share/<name>/<filter>`` (MQTT 5.0, §4.8.2) is checked by its
filter part (:func:`check_subscription`).
"""

from __future__ import annotations

import re
from collections.abc import Sequence

from spanwatch.connectors.mqtt.settings import TopicRule

PLACEHOLDER = re.compile(r"\{(\d+)\}")


def check_filter(pattern: str) -> list[str]:
    """Split an MQTT topic filter into its levels; raise ValueError if it is not a valid filter.

    >>> check_filter("quillmere/q2/+/tension")
    ['quillmere', 'q2', '+', 'tension']
    >>> check_filter("quillmere/#/x")
    Traceback (most recent call last):
    ...
    ValueError: expected an MQTT topic filter ('+' alone in a level, '#' alone at the end), got 'quillmere/#/x'
    """
    levels = pattern.split("/")
    for i, level in enumerate(levels):
        if ("+" in level and level != "+") or ("#" in level and (level != "#" or i != len(levels) - 1)):
            raise ValueError(f"expected an MQTT topic filter ('+' alone in a level, '#' alone at the end), "
                             f"got {pattern!r}")
    if not pattern or "\x00" in pattern:
        raise ValueError(f"expected an MQTT topic filter (at least one character, no U+0000), got {pattern!r}")
    return levels


def check_subscription(pattern: str) -> list[str]:
    """:func:`check_filter` for what may be subscribed to: a filter or a shared subscription ``$share/<name>/<filter>``
    (only the filter part is checked and returned)."""
    if pattern.startswith("$share/") and pattern.count("/") >= 2:
        pattern = pattern.split("/", 2)[2]
    return check_filter(pattern)


def check_rule(pattern: str, tag: str) -> list[str]:
    """The levels of a topic rule's filter; ValueError if the filter is invalid or the tag template names a
    wildcard level the filter does not have (``{1}`` is the first wildcard's level)."""
    levels = check_filter(pattern)
    wild = sum(lv in ("+", "#") for lv in levels)
    for m in PLACEHOLDER.finditer(tag):
        if not 1 <= int(m.group(1)) <= wild:
            raise ValueError(f"expected placeholders {{1}}..{{{wild}}} in the tag template (the filter "
                             f"{pattern!r} has {wild} wildcard level(s)), got {tag!r}")
    return levels


def match_filter(levels: Sequence[str], topic: str) -> list[str] | None:
    """The levels the wildcards of a filter matched in ``topic``, in order; None if it does not match.

    ``+`` matches one level; ``#`` matches the parent level and any number of levels below
    it (its value is the rest of the topic, ``""`` for the parent itself). Topics starting
    with ``$`` are not matched by a filter starting with a wildcard.

    >>> match_filter("quillmere/q2/+/+".split("/"), "quillmere/q2/s5/tension")
    ['s5', 'tension']
    >>> match_filter("quillmere/#".split("/"), "quillmere/q2/s5/tension")
    ['q2/s5/tension']
    >>> match_filter("quillmere/q2/+".split("/"), "quillmere/q2/s5/tension") is None
    True
    """
    parts = topic.split("/")
    if topic.startswith("$") and levels and levels[0] in ("+", "#"):
        return None
    out: list[str] = []
    for i, level in enumerate(levels):
        if level == "#":
            out.append("/".join(parts[i:]))
            return out
        if i >= len(parts):
            return None
        if level == "+":
            out.append(parts[i])
        elif level != parts[i]:
            return None
    return out if len(parts) == len(levels) else None


class TopicRouter:
    """Topic -> tag index: a tag's exact topic first; then the topic rules, in order.

    A rule maps to the tag its template names, ``{1}``, ``{2}`` ... being the levels its
    filter's wildcards matched; the first rule that yields a known tag wins. Answers are
    cached per topic (the cache is cleared when it grows past ``cache_size``).
    """

    def __init__(self, tags: Sequence[str], exact: dict[str, str], rules: Sequence[TopicRule],
                 cache_size: int = 100_000) -> None:
        self.index = {name: i for i, name in enumerate(tags)}
        self.exact = {topic: self.index[name] for name, topic in exact.items()}
        self.maps: list[tuple[list[str], str]] = [(check_rule(r.pattern, r.tag), r.tag) for r in rules]
        self.cache: dict[str, int] = {}
        self.cache_size = cache_size

    def lookup(self, topic: str) -> int:
        """The tag index of ``topic``, -1 if it maps to no known tag."""
        idx = self.cache.get(topic)
        if idx is None:
            idx = self._resolve(topic)
            if len(self.cache) >= self.cache_size:
                self.cache.clear()
            self.cache[topic] = idx
        return idx

    def _resolve(self, topic: str) -> int:
        idx = self.exact.get(topic)
        if idx is not None:
            return idx
        for levels, template in self.maps:
            caught = match_filter(levels, topic)
            if caught is not None:
                name = PLACEHOLDER.sub(lambda m, c=caught: c[int(m.group(1)) - 1], template)
                idx = self.index.get(name)
                if idx is not None:
                    return idx
        return -1
