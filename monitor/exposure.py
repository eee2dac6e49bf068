"""What a line config exposes: inline secrets, unencrypted links and open listeners; its hash without secrets.

Two jobs, both reading the validated :class:`~spanwatch.monitor.config.LineConfig`:

* :func:`config_hash` identifies a config in the history (``runs.config_hash``, every alarm row). It is
  the SHA-256 of a canonical form of the *parsed* config (every table and key, SI values, sorted keys)
  in which every secret field (a :data:`~spanwatch.monitor.schema.Secret`) is replaced by its reference
  text when it is one (``env:NAME``, ``file:/path``, which say where the secret is, not what it is) and
  by ``***`` when it is inline, and every URL's password by ``***``. So the hash changes when the line,
  its settings or where a secret is kept change, never when only a password changes, and no dictionary
  attack on the hash can recover a password: none went into it.
* :func:`exposure_warnings` lists, one sentence each, what an operator should fix before a plant network
  sees the daemon: inline secrets (in the file, its backups and every copy), OPC UA without security on a
  non-loopback endpoint, an MQTT password without TLS, and an HTTP endpoint (no authentication) listening
  beyond loopback. ``spanwatch check-config`` shows them; ``spanwatch run`` logs them at start.
"""

from __future__ import annotations

import hashlib
import ipaddress
import json
import typing
from typing import Any
from urllib.parse import urlsplit

from pydantic import BaseModel
from spanwatch.connectors.secrets import MASK, is_reference, redact_url, url_password
from spanwatch.monitor.config import LineConfig
from spanwatch.monitor.schema import _secret


def _is_secret(annotation: Any) -> bool:
    """True when a field's annotation is (an optional) ``Secret``: Annotated with the secret validator."""
    if any(getattr(m, "func", None) is _secret for m in getattr(annotation, "__metadata__", ())):
        return True
    return any(_is_secret(a) for a in typing.get_args(annotation))


def _canonical(value: Any, secret: bool = False) -> Any:
    if secret and isinstance(value, str):
        return value if is_reference(value) else MASK
    if isinstance(value, BaseModel):
        fields = type(value).model_fields
        return {(f.alias or name): _canonical(getattr(value, name), _is_secret(f.annotation))
                for name, f in fields.items()}
    if isinstance(value, dict):
        return {str(k): _canonical(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_canonical(v) for v in value]
    if isinstance(value, str) and "://" in value:
        return redact_url(value)
    return value


def canonical_config(cfg: LineConfig) -> dict[str, Any]:
    """The parsed config as plain data with every secret replaced (see the module docstring)."""
    out = _canonical(cfg)
    assert isinstance(out, dict)
    return out


def config_hash(cfg: LineConfig) -> str:
    """16 hex digits of the SHA-256 of :func:`canonical_config` as sorted, compact JSON."""
    text = json.dumps(canonical_config(cfg), sort_keys=True, separators=(",", ":"), allow_nan=True)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()[:16]


def config_text(cfg: LineConfig, points: list[Any] | None = None) -> str:
    """The config as the history keeps it (``config_versions``), as indented JSON: ``config`` is
    :func:`canonical_config` (its bases merged in, its secrets removed; its hash is :func:`config_hash`) and
    ``alarm_points`` every alarm point it resolved to (limits, deadband, delays, priority, rationalization), so the
    alarm list in force at any past moment can be shown (``spanwatch alarm-list --db ... --at TIME``)."""
    import dataclasses

    return json.dumps({"config": canonical_config(cfg),
                       "alarm_points": [dataclasses.asdict(p) for p in points or []]},
                      sort_keys=True, indent=1, allow_nan=True)


def remember_config(history: Any, line: Any, points: list[Any]) -> None:
    """Save the line's config and its alarm points in the history once per version (who: this process's login)."""
    from spanwatch.monitor.operate import login_name

    history.save_config_version(line_name=line.name, config_hash=line.config_hash, config_file=line.file,
                                content=config_text(line.config, points), saved_by=login_name())


def inline_secrets(cfg: LineConfig) -> list[str]:
    """Key paths of secrets written into the config itself: a password not ``env:``/``file:``, a URL with one."""
    found: list[str] = []

    def walk(value: Any, path: str, secret: bool = False) -> None:
        if secret and isinstance(value, str) and not is_reference(value):
            found.append(path)
        elif isinstance(value, BaseModel):
            for name, f in type(value).model_fields.items():
                key = f.alias or name
                walk(getattr(value, name), f"{path}.{key}" if path else key, _is_secret(f.annotation))
        elif isinstance(value, dict):
            for k, v in value.items():
                walk(v, f"{path}.{k}")
        elif isinstance(value, list | tuple):
            for i, v in enumerate(value):
                walk(v, f"{path}[{i}]")
        elif isinstance(value, str) and "://" in value and url_password(value):
            found.append(path)

    walk(cfg, "")
    return found


def is_loopback(host: str) -> bool:
    """True for an address only this machine can reach: 127.0.0.0/8, ::1, ``localhost``.

    An empty host is the loopback default of spanwatch's listeners; any other name (which the plant's
    DNS may resolve to anything) counts as reachable from the network.

    >>> is_loopback("127.0.0.1"), is_loopback("[::1]"), is_loopback("localhost"), is_loopback("0.0.0.0")
    (True, True, True, False)
    """
    host = host.strip().strip("[]").lower()
    if host in ("", "localhost") or host.endswith(".localhost"):
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def exposure_warnings(cfg: LineConfig, http: str | None = None) -> list[str]:
    """One sentence per exposure of this config; ``http`` the listener actually used (default ``[daemon] http``)."""
    out = [f"{path}: a secret written into the config (it is in the file, its backups and every copy); "
           "use \"env:NAME\" or \"file:/path\" instead" for path in inline_secrets(cfg)]
    for name, spec in cfg.sources.items():
        if spec.kind == "opcua" and spec.security_policy == "None":
            host = urlsplit(spec.endpoint).hostname or ""
            if not is_loopback(host):
                creds = " and the password" if spec.password else ""
                out.append(f"sources.{name}: OPC UA security policy None on {redact_url(spec.endpoint)}: the values"
                           f"{creds} cross the network unsigned and unencrypted; use security_policy "
                           "\"Basic256Sha256\" with security_mode \"SignAndEncrypt\"")
        if spec.kind == "mqtt" and spec.password and not spec.tls:
            out.append(f"sources.{name}: MQTT password sent without TLS to {spec.host}:{spec.port} (readable by "
                       "anyone on the path); set tls = true (port 8883 on most brokers)")
    address = cfg.daemon.http if http is None else http
    if address:
        host = address.rpartition(":")[0]
        if not is_loopback(host):
            out.append(f"daemon.http: the HTTP endpoint listens on {address}, beyond this machine; /healthz and "
                       "/metrics have no authentication: listen on 127.0.0.1 and let a reverse proxy or the "
                       "metrics agent on this machine reach it")
    return out
