"""Wells from several differentiation batches are compared within their batch."""

import numpy as np
import pandas as pd
import pytest

from beatlab.batch._stats import _block, batch_statistics
from beatlab.schema import ROW_FIELDS
from beatlab.stats import compare_groups


def _recordings():
    # two differentiation batches on one plate; batch 2 beats 10 bpm faster in every well
    # (vehicle included); the drug adds +20 % in both
    rows = []
    for b, offset in (("d1", 0.0), ("d2", 10.0)):
        for k in range(4):
            for role, conc, effect in (("vehicle", 0.0, 1.0), ("sample", 1.0, 1.2)):
                rate = (60.0 + offset + k * 0.5) * effect
                rows.append(
                    {
                        "plate": "P1",
                        "well": f"{'ABCD'[2 * (b == 'd2') + (role == 'sample')]}{k + 1}",
                        "fov": "",
                        "timepoint": "",
                        "batch": b,
                        "role": role,
                        "compound": "drug" if role == "sample" else "DMSO",
                        "concentration": conc,
                        "unit": "uM",
                        "status": "ok",
                        "error": "",
                        "exclude": False,
                        "exclude_reason": "",
                        "beat_rate_bpm": rate,
                    }
                )
    table = pd.DataFrame(rows)
    for field in ROW_FIELDS:  # every other recording column, unknown here
        if field.name not in table:
            table[field.name] = 0 if field.dtype in ("int", "bool") else np.nan
            if field.dtype in ("str", "boolean"):
                table[field.name] = None
    return table


def test_block_only_with_several_batches():
    table = _recordings()
    assert _block(table) == "batch"
    assert _block(table.assign(batch="d1")) is None
    assert _block(table.drop(columns="batch")) is None


def test_groups_are_compared_within_their_batch():
    tables, _ = batch_statistics(_recordings(), metrics=["beat_rate_bpm"])
    drug = tables["groups"][tables["groups"]["compound"] == "drug"].iloc[0]
    # the drug's wells read 20 points above the vehicle's (of the plate's vehicle mean) in
    # either case; blocked by batch, the 10 bpm batch offset no longer widens the spread
    # (measured: Welch p 1.8e-10 blocked, 6e-4 without)
    assert drug["n_batches"] == 2
    assert drug["difference"] == pytest.approx(20.0, abs=0.01)
    assert drug["p_welch"] < 1e-6
    # the same wells compared without blocking: the 10 bpm batch offset swamps the effect
    wells = tables["wells"][tables["wells"]["status"] == "ok"]
    plain = compare_groups(wells, metrics=["beat_rate_bpm_norm"], by=["compound"])
    assert plain.iloc[0]["p_welch"] > 1e-4
