"""``quaver bench``: the engine benchmark (``dsp.bench``) or, with ``--service``, the
whole-service load benchmark, or, with ``--dashboard``, the plant view in a browser."""

from __future__ import annotations

import argparse
from pathlib import Path

from .common import CliError

DASHBOARD_ONLY = ("machines", "danger", "alert", "minutes", "screenshot")


def _dashboard(args: argparse.Namespace) -> int:
    for opt in ("repeats", "seconds"):
        if getattr(args, opt) is not None:
            raise CliError(f"--{opt} does not apply to --dashboard", 2)
    if args.short:
        raise CliError("--short does not apply to --dashboard (use e.g. --minutes 0.5)", 2)
    if args.opcua:
        raise CliError("--opcua applies to --service", 2)
    from bench.dashboard import main
    from bench.pageprobe import CHROMIUM
    from bench.plant import PlantPlan

    base = PlantPlan()
    channels = base.channels
    if args.channels is not None:
        try:
            channels = int(args.channels)
        except ValueError:
            raise CliError(f"--channels {args.channels!r}: expected one count with --dashboard",
                           2) from None

    def given(v: int | None, default: int) -> int:
        return default if v is None else int(v)

    try:
        plan = PlantPlan(channels=channels, machines=given(args.machines, base.machines),
                         danger=given(args.danger, base.danger),
                         alert=given(args.alert, base.alert))
    except ValueError as e:
        raise CliError(str(e), 2) from None
    try:
        import playwright.sync_api  # noqa: F401
    except ImportError:
        raise CliError("--dashboard needs Playwright for Python (pip install playwright; "
                       "the browser is the system's Chromium)", 1) from None
    if not CHROMIUM.exists():
        raise CliError(f"--dashboard needs Chromium at {CHROMIUM} (apt-get install chromium)",
                       1)

    minutes = 5.0 if args.minutes is None else float(args.minutes)
    json_path = args.json if isinstance(args.json, str) else None
    if json_path is not None and not Path(json_path).resolve().parent.is_dir():
        raise CliError(f"--json {json_path!r}: its folder does not exist", 2)
    shot = args.screenshot
    if shot is not None and not Path(shot).resolve().parent.is_dir():
        raise CliError(f"--screenshot {shot!r}: its folder does not exist", 2)
    try:
        return int(main(plan, minutes, json_path=json_path, as_json=args.json is True,
                        screenshot=shot))
    except RuntimeError as e:  # bench.harness.HarnessError too: the service did not start
        raise CliError(f"--dashboard: {e}", 1) from None


def _mqtt(args: argparse.Namespace) -> int:
    from bench.mqtt import main_mqtt

    from ..config.base import parse_listen

    if args.repeats is not None or args.short:
        raise CliError("--repeats and --short do not apply to --service --mqtt", 2)
    if args.mqtt != "auto":
        try:
            parse_listen(args.mqtt)
        except ValueError as e:
            raise CliError(f"--mqtt: {e} (or 'auto')", 2) from None
    channels = None
    if args.channels is not None:
        try:
            channels = int(args.channels)
        except ValueError:
            raise CliError(f"--channels {args.channels!r}: expected one count with --mqtt",
                           2) from None
        if channels < 1:
            raise CliError(f"--channels {args.channels!r}: must be >= 1", 2)
    try:
        return main_mqtt(args.mqtt, channels, args.seconds, args.json is True)
    except RuntimeError as e:  # no mosquitto for 'auto'; the service did not start
        raise CliError(f"--mqtt: {e}", 1) from None


def _opcua(args: argparse.Namespace) -> int:
    if args.repeats is not None or args.short:
        raise CliError("--repeats and --short do not apply to --service --opcua", 2)
    try:
        import asyncua  # noqa: F401
    except ImportError:
        raise CliError("--opcua needs asyncua (pip install 'quaver[opcua]')", 1) from None
    from bench.opcua import main

    channels = 256
    if args.channels is not None:
        try:
            channels = int(args.channels)
        except ValueError:
            raise CliError(f"--channels {args.channels!r}: expected one count with --opcua",
                           2) from None
    seconds = 20.0 if args.seconds is None else float(args.seconds)
    if args.mqtt is not None and args.mqtt != "auto":
        from ..config.base import parse_listen

        try:
            parse_listen(args.mqtt)
        except ValueError as e:
            raise CliError(f"--mqtt: {e} (or 'auto')", 2) from None
    try:
        return int(main(channels, seconds, as_json=args.json is True, mqtt=args.mqtt))
    except RuntimeError as e:  # no mosquitto for 'auto'; the service did not start
        raise CliError(f"--opcua: {e}", 1) from None


def _orders(args: argparse.Namespace) -> int:
    if args.short or args.opcua or args.mqtt is not None:
        raise CliError("--short, --opcua and --mqtt do not apply to --orders", 2)
    from bench.orders import main

    counts: tuple[int, ...] = (1, 8)
    if args.channels is not None:
        try:
            counts = tuple(int(c) for c in args.channels.split(","))
        except ValueError:
            raise CliError(f"--channels {args.channels!r}: expected counts like 1,8", 2) from None
        if any(c < 1 for c in counts):
            raise CliError(f"--channels {args.channels!r}: counts must be >= 1", 2)
    return int(main(counts, args.seconds, args.repeats, as_json=args.json is True))


def cmd_bench(args: argparse.Namespace) -> int:
    if args.dashboard:
        return _dashboard(args)
    if args.orders:
        if any(getattr(args, o) is not None for o in DASHBOARD_ONLY):
            raise CliError("--machines, --danger, --alert, --minutes and --screenshot apply "
                           "to --dashboard only", 2)
        return _orders(args)
    given = [f"--{o}" for o in DASHBOARD_ONLY if getattr(args, o) is not None]
    if given:
        raise CliError(f"{', '.join(given)} applies to --dashboard only", 2)
    if isinstance(args.json, str):
        raise CliError("--json FILE applies to --dashboard; use --json alone to print JSON", 2)
    if args.mqtt is not None and not args.service:
        raise CliError("--mqtt applies to --service only", 2)
    if args.service and args.mqtt is not None and not args.opcua:
        return _mqtt(args)
    if args.opcua and not args.service:
        raise CliError("--opcua applies to --service", 2)
    if args.opcua:
        return _opcua(args)
    if args.workers is not None and args.cluster is None:
        raise CliError("--workers applies to --service --cluster", 2)
    if args.cluster is not None and not args.service:
        raise CliError("--cluster applies to --service only", 2)
    if args.cluster is not None and args.cluster != "process":
        try:
            import ray  # noqa: F401
        except ImportError:
            raise CliError("--cluster needs Ray (pip install 'quaver[ray]')", 1) from None
    if args.service:
        import bench as loadbench

        if args.repeats is not None:
            raise CliError("--repeats applies to the engine benchmark, not --service", 2)
        steps = None
        if args.channels is not None:
            try:
                steps = [int(c) for c in args.channels.split(",")]
            except ValueError:
                raise CliError(f"--channels {args.channels!r}: expected counts like 32,64,128",
                               2) from None
            if any(c < 1 for c in steps):
                raise CliError(f"--channels {args.channels!r}: counts must be >= 1", 2)
        return int(loadbench.main(short=args.short, as_json=args.json, steps=steps,
                                  step_s=args.seconds, cluster=args.cluster,
                                  workers=args.workers or 1))
    from dsp import bench

    argv: list[str] = []
    for opt in ("channels", "seconds", "repeats"):
        v = getattr(args, opt)
        if v is not None:
            argv += [f"--{opt}", str(v)]
    argv += ["--short"] * args.short + ["--json"] * args.json
    return int(bench.main(argv))
