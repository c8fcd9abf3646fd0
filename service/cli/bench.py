"""``quaver bench``: the engine benchmark (``dsp.bench``) or, with ``--service``, the
whole-service load benchmark."""

from __future__ import annotations

import argparse

from .common import CliError


def cmd_bench(args: argparse.Namespace) -> int:
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
                                  step_s=args.seconds))
    from dsp import bench

    argv: list[str] = []
    for opt in ("channels", "seconds", "repeats"):
        v = getattr(args, opt)
        if v is not None:
            argv += [f"--{opt}", str(v)]
    argv += ["--short"] * args.short + ["--json"] * args.json
    return int(bench.main(argv))
