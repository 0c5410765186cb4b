"""A small simulated fleet with places, groups, a fitted model and hostile strings, shared by the
view tests (built once per session: the fit takes a few seconds)."""

from __future__ import annotations

import numpy as np
import pytest

from tests.survival.fleetsim import simulate_fleet
from triage.store.dataset import Store
from triage.survival.run import fit_store

#: A model name a hostile or broken firmware could report: quote, backslash, line feed, markup,
#: a terminal escape (ESC [31m) and a right-to-left override.
HOSTILE = 'Q"H\\x$^{$\n<script>alert(1)</script>\x1b[31m[b]\u202e'
#: Host that stops reporting three nights before the end.
QUIET_HOST = "birch-r2-n01"


@pytest.fixture(scope="session")
def fleet(tmp_path_factory):
    snapshots, removals, truth = simulate_fleet(n_drives=300, days=40, seed=21, scale_hours=20_000)
    serials = sorted(snapshots["serial"].unique())
    index = {s: i for i, s in enumerate(serials)}
    position = snapshots["serial"].map(index)
    hosts = np.array(["ash-r1-n01", "ash-r1-n02", "ash-r2-n01", QUIET_HOST, "birch-r2-n02"])
    snapshots["host"] = hosts[position % len(hosts)]
    snapshots["slot"] = "bay" + (position // len(hosts)).astype(str).str.zfill(2)
    snapshots["group"] = snapshots["host"] + "-g" + (position // len(hosts) % 6).astype(str)
    snapshots["device"] = "/dev/sd" + (position % 26).map(lambda k: chr(97 + k))
    snapshots["wwn"] = "5000c500" + position.map(lambda k: f"{k:08x}")
    last_night = snapshots["taken_at"].max().floor("D")
    quiet = (snapshots["host"] == QUIET_HOST) & (snapshots["taken_at"] >= last_night - np.timedelta64(2, "D"))
    snapshots = snapshots[~quiet].copy()
    # the hostile drive: a current, pending-sector drive on a reporting host
    current = snapshots[snapshots["taken_at"] >= last_night]
    pick = current[(current["pending_sectors"] > 0) & (current["host"] != QUIET_HOST)]["serial"].iloc[0]
    snapshots.loc[snapshots["serial"] == pick, ["model", "host"]] = [HOSTILE, HOSTILE]
    # a lost member: a current drive of another reporting group vanishes two nights before the end
    others = current[(current["host"] == "ash-r1-n01") & (current["serial"] != pick)]
    lost = others["serial"].iloc[0]
    lost_group = others["group"].iloc[0]
    gone = (snapshots["serial"] == lost) & (snapshots["taken_at"] >= last_night - np.timedelta64(1, "D"))
    snapshots = snapshots[~gone].copy()
    survivor = sorted(set(current.loc[current["group"] == lost_group, "serial"]) - {lost})[0]
    root = tmp_path_factory.mktemp("views-store")
    store = Store(root)
    store.append("snapshots", snapshots)
    store.append("removals", removals)
    model, _ = fit_store(store)
    return {"store": store, "root": root, "hostile_serial": pick, "model": model, "truth": truth,
            "snapshots": snapshots, "lost_serial": lost, "degraded_group": lost_group, "survivor": survivor}
