"""Reload the config file while running: apply its ``[[alarms]]`` and ``[[tokens]]`` (alarm
rules that stay keep their state), refuse anything that needs a restart.

Works on the running :class:`~service.app.Service`; knows nothing about sources or HTTP
routes (the API and SIGHUP call it)."""

from __future__ import annotations

import asyncio
import gc
import logging
from typing import TYPE_CHECKING, Any

from .alarms import rules_from_config
from .api.stream import revoke_sessions
from .config import ConfigError, check_listen_allowed, load_config
from .context import ReloadRefused
from .heap import freeze_start_up_heap

if TYPE_CHECKING:
    from .app import Service

log = logging.getLogger("quaver")


async def reload_config(svc: Service) -> dict[str, Any]:
    """Re-read the config file and apply its ``[[alarms]]`` and ``[[tokens]]``.

    Everything else (sources, channels, analysis, profiles, bands, tones, service) needs
    a restart: if any of it changed, or the file is not valid, nothing is applied
    (:class:`ReloadRefused` says why). Alarm rules that stay keep their state; the new
    alarm state is committed to the store before the reload answers."""
    if svc.config_path is None:
        raise ReloadRefused(409, "this service was started without a config file (the "
                            "demo has none); there is nothing to reload")
    try:
        new = await asyncio.to_thread(load_config, svc.config_path)
        check_listen_allowed(new)
    except ConfigError as e:
        raise ReloadRefused(422, f"{svc.config_path}: nothing applied", e.problems) from None
    live = {"alarms", "tokens"}
    before, after = svc.cfg.model_dump(exclude=live), new.model_dump(exclude=live)
    fixed = [k for k in before if before[k] != after.get(k)]
    if fixed:
        raise ReloadRefused(
            409, f"changes to {', '.join(fixed)} need a restart; nothing applied"
        )
    try:
        rules = rules_from_config(new, channels=svc.channel_ids)
    except ValueError as e:
        raise ReloadRefused(422, f"{svc.config_path}: nothing applied", [str(e)]) from None
    active = {v.rule for v in svc.alarms.active()}
    diff = svc.alarms.replace_rules(rules)
    svc.cfg = svc.cfg.model_copy(update={"alarms": new.alarms, "tokens": new.tokens})
    if svc.http_app is not None:
        svc.http_app.state.config = svc.cfg
        # token changes hold at once: the gate reads the new config on every request,
        # and live WebSocket sessions whose token went away or was demoted are closed
        revoked = revoke_sessions(svc.http_app.state, svc.cfg)
        if revoked:
            log.info("reload: closed %d stream sessions (token withdrawn or demoted)",
                     revoked)
    try:
        await asyncio.wrap_future(svc.store.put_events([], alarm_state=svc.alarms.snapshot()))
    except Exception as err:  # the store failing must not undo the reload
        svc.store_errors += 1
        log.error("could not store the alarm state after a reload: %s", err)
    if gc.get_freeze_count():
        # The config and rules just replaced were frozen with the start-up heap: a frozen
        # object in a reference cycle is never collected, so thaw, collect (one full
        # collection, ~0.1 s, on a rare admin action) and freeze again.
        gc.unfreeze()
        freeze_start_up_heap()
    # stream clients holding the rules' levels (the plant view) fetch /alarms again on this
    # rather than polling for a reload that may never come
    svc.hub.publish_notice("rules", **{k: list(diff[k]) for k in ("added", "changed", "removed")})
    dropped = sorted(active & set(diff["removed"]))
    log.info(
        "config reloaded from %s: alarm rules +%d ~%d -%d (%d kept), %d token(s)%s",
        svc.config_path, len(diff["added"]), len(diff["changed"]), len(diff["removed"]),
        len(diff["kept"]), len(new.tokens),
        f"; active alarms dropped with their rules: {', '.join(dropped)}" if dropped else "",
    )
    return {
        "config": str(svc.config_path),
        "alarm_rules": {k: diff[k] for k in ("added", "changed", "removed")},
        "alarm_rules_kept": len(diff["kept"]),
        "active_alarms_dropped": dropped,
        "tokens": len(new.tokens),
    }


async def reload_logged(svc: Service) -> None:
    """SIGHUP: reload, and log (rather than raise) why it was refused."""
    try:
        await reload_config(svc)
    except ReloadRefused as e:
        log.error("config reload refused: %s%s", e.reason,
                  "".join(f"\n  {p}" for p in e.problems))
