"""Build a simulated source by name from command-line style options.

Names: ``polarization`` (qubit pairs, CHSH analyzers), ``qudit`` (MUBs, optional random
frames), ``local`` (deterministic strategies at the CHSH local bound) and ``adaptive-local``
(a local source with memory).
"""

from __future__ import annotations

import argparse

from simulators.base import PairSource

__all__ = ["SOURCE_KINDS", "source_from_args"]

SOURCE_KINDS = ("polarization", "qudit", "local", "adaptive-local")


def source_from_args(args: argparse.Namespace) -> PairSource:
    """The source named by ``args.source`` with the simulate options applied."""
    kind = args.source
    if kind not in SOURCE_KINDS:
        raise ValueError(f"source {kind!r} not in {SOURCE_KINDS}")
    if kind == "polarization":
        from simulators.quantum import polarization_source

        common = dict(
            pair_rate_hz=args.rate,
            efficiency=0.25 if args.efficiency is None else args.efficiency,
            dark_rate_hz=args.dark_rate,
            keep_no_click=args.no_click,
        )
        if args.drift:
            from simulators.drift import drifting_polarization_source

            return drifting_polarization_source(
                seed=args.seed, final_visibility=args.visibility, **common
            )
        return polarization_source(
            visibility=args.visibility, misalignment_deg=args.misalignment, **common
        )
    if kind == "qudit":
        from simulators.quantum import qudit_source

        return qudit_source(
            args.dim,
            n_bases=args.bases,
            frames=args.frames,
            seed=args.seed,
            visibility=args.visibility,
            pair_rate_hz=args.rate,
            efficiency=1.0 if args.efficiency is None else args.efficiency,
            dark_rate_hz=args.dark_rate,
            keep_no_click=args.no_click,
        )
    from labwatch.bell import chsh
    from simulators.local import AdaptiveLocalSource, LocalMixtureSource

    # Local sources trade CHSH: trials per second = --rate (no detector model).
    if kind == "local":
        return LocalMixtureSource.at_bound(chsh(), rate=args.rate)
    q = [[0.25, 0.25], [0.25, 0.25]]
    return AdaptiveLocalSource(chsh(), q, rate=args.rate, chunk=max(1, int(args.rate // 1000)))
