"""MQTT source and alarm publisher (paho-mqtt 2.x, MQTT v5 or 3.1.1).

:class:`MqttConnector` subscribes to a broker and turns every message into one tag
sample; :class:`MqttAlarmPublisher` publishes alarm transitions and the list of active
alarms back to the broker. Both take plain parameters (:class:`MqttSettings`, the tags'
topics, a sink) and import nothing from the application.

Modules, each named for what it holds:

* ``settings``: :class:`MqttSettings` and :class:`TopicRule`, what an application fills in;
* ``topics``: the one MQTT topic-filter check, wildcard matching, the topic -> tag router;
* ``payload``: payload bytes -> one sample, and the reasons a message is refused;
* ``queue``: the bounded queue between the network thread and the event loop;
* ``client``: the one place a paho client is made and connected, and the network thread;
* ``source``: :class:`MqttConnector`, the live source (connection, subscriptions, delivery);
* ``messages``: the JSON alarm messages and alarm list (their schema and version), pure functions;
* ``publisher``: :class:`MqttAlarmPublisher`, alarms and their lifecycle back to the broker;
* ``actions``: :class:`MqttActionListener`, operators' actions (acknowledge, shelve ...) from the broker.
"""

from __future__ import annotations

import importlib
from typing import Any

_WHERE = {
    "ActionMessage": "actions",
    "MqttActionListener": "actions",
    "MqttConnectionError": "client",
    "MalformedPayload": "payload",
    "PayloadDecoder": "payload",
    "MqttAlarmPublisher": "publisher",
    "transition_message": "messages",
    "SampleQueue": "queue",
    "MqttSettings": "settings",
    "TopicRule": "settings",
    "MqttConnector": "source",
    "TopicRouter": "topics",
    "check_filter": "topics",
    "match_filter": "topics",
}


def __getattr__(name: str) -> Any:
    """Re-export on first use (PEP 562), so reading a config's MQTT settings does not import paho."""
    if name in _WHERE:
        return getattr(importlib.import_module(f"{__name__}.{_WHERE[name]}"), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


__all__ = [
    "ActionMessage",
    "MalformedPayload",
    "MqttActionListener",
    "MqttAlarmPublisher",
    "MqttConnectionError",
    "MqttConnector",
    "MqttSettings",
    "PayloadDecoder",
    "SampleQueue",
    "TopicRouter",
    "TopicRule",
    "check_filter",
    "match_filter",
    "transition_message",
]
