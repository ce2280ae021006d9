"""Topic levels and header values built from untrusted text, and where the source sits in a topic.

Every value that reaches a PUBLISH packet's topic or a user property comes from a recogniser's
payload or topic, so it is cleaned here to what MQTT and brokers accept. MQTT 5.0 section 1.5.4
(3.1.1 section 1.5.3): UTF-8 strings must be well formed, must not hold U+0000 and should not hold
the control characters U+0001-U+001F, U+007F-U+009F or non-characters. mosquitto (2.0,
``mosquitto_validate_utf8`` in lib/utf8_mosq.c) enforces all of that: a PUBLISH whose topic or
user property holds any of them is a malformed packet, and the broker drops the connection.
Header values also lose U+FEFF: paho-mqtt (2.2, ``readUTF`` in properties.py) refuses it in a
property and drops the connection, so a downstream consumer on paho would stall on a dead letter
whose headers carry one (the relay's own fuzz run found it).
"""

from __future__ import annotations

import functools
import re
from collections.abc import Mapping, Sequence

from paho.mqtt.client import topic_matches_sub

from relay.core.settings import source_level_of, unshared

__all__ = ["MISSING_VALUE", "clean_text", "render_topic", "sanitize_level", "source_from_topic"]

_PLACEHOLDER = re.compile(r"\{(source|speaker|decision)\}")
# C0 and C1 controls, DEL, UTF-16 surrogates (not encodable), and the 66 non-characters:
# U+FDD0-U+FDEF and the last two code points of each of the 17 planes.
_NONCHARACTERS = "".join(f"{chr(plane * 0x10000 + 0xFFFE)}{chr(plane * 0x10000 + 0xFFFF)}" for plane in range(17))
_BROKER_REFUSES = "\x00-\x1f\x7f-\x9f\ud800-\udfff\ufdd0-\ufdef" + re.escape(_NONCHARACTERS)
_UNSAFE_TEXT = re.compile(f"[{_BROKER_REFUSES}\ufeff]")
# In a topic level also the wildcards and the level separator: a value must never add a level
# or turn a publish topic into a filter.
_UNSAFE_LEVEL = re.compile(f"[+#/{_BROKER_REFUSES}]")
_MAX_LEVEL_CHARS = 128
MISSING_VALUE = "_"


def clean_text(value: str, *, limit: int = 1024) -> str:
    """``value`` with every character a broker refuses in a UTF-8 string replaced by '?',
    cut to ``limit`` characters: safe as an MQTT 5 user property value."""
    return _UNSAFE_TEXT.sub("?", value[:limit])


def sanitize_level(value: object) -> str:
    """One topic level made from an untrusted value.

    Wildcards, '/', control characters (C0 and C1), non-characters and surrogates become '_';
    an empty or missing value becomes '_'; a leading '$' (reserved for broker topics) becomes
    '_'; the level is cut to 128 characters (at most 512 bytes of UTF-8).
    """
    if value is None:
        return MISSING_VALUE
    text = _UNSAFE_LEVEL.sub("_", str(value)[:_MAX_LEVEL_CHARS])
    if text.startswith("$"):
        text = "_" + text[1:]
    return text or MISSING_VALUE


def render_topic(template: str, values: Mapping[str, object]) -> str:
    """Fill ``{source}``, ``{speaker}`` and ``{decision}`` with sanitised values.

    The template itself is checked when the configuration loads (no wildcards, no empty level),
    so with sanitised values the result is always a valid publish topic.
    """
    return _PLACEHOLDER.sub(lambda m: sanitize_level(values.get(m.group(1))), template)


# The answers of source_from_topic for this many (topic, filters, setting), the topics at most
# _CACHED_TOPIC_CHARS long: a relay sees the same few device topics again and again, and paho's
# topic_matches_sub builds a matcher tree on every call (4-7 us per message). Bounded: 1,024
# short topics are a few hundred kilobytes however many devices there are.
_CACHED_TOPICS = 1024
_CACHED_TOPIC_CHARS = 256


def source_from_topic(topic: str, filters: Sequence[str], setting: int | str) -> str | None:
    """The source named by the input topic: the level ``setting`` picks (see
    ``TopicSettings.source_level``) of the first filter that matches; None when none says."""
    if setting == "none":
        return None
    if len(topic) > _CACHED_TOPIC_CHARS:
        return _source_from_topic(topic, filters, setting)
    return _cached_source_from_topic(topic, tuple(filters), setting)


def _source_from_topic(topic: str, filters: Sequence[str], setting: int | str) -> str | None:
    levels = topic.split("/")
    for topic_filter in filters:
        if not topic_matches_sub(unshared(topic_filter), topic):
            continue
        level = source_level_of(topic_filter, setting)
        if level is not None and level < len(levels) and levels[level]:
            return levels[level]
        return None
    return None


_cached_source_from_topic = functools.lru_cache(maxsize=_CACHED_TOPICS)(_source_from_topic)
