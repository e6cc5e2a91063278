"""Ensemble members in separate files (one member per file): a member key column, no false conflict."""

from __future__ import annotations

import numpy as np

from circtrack import config, engine, output
from tests.conftest import make_dataset, write


def _member_file(tmp_path, variant, du):
    ds = make_dataset(3)
    ds["ua"] = ds["ua"] + du
    ds.attrs.update(source_id="INVENTED-2", experiment_id="historical", variant_label=variant)
    return write(ds, tmp_path / f"ua_va_INVENTED-2_historical_{variant}.nc")


def test_members_in_separate_files_become_a_key_column(tmp_path):
    a = _member_file(tmp_path, "r1i1p1f1", 0.0)
    b = _member_file(tmp_path, "r2i1p1f1", 1.0)
    cfg = config.load()
    out = engine.track([b, a], cfg, metric_ids=["eddy_jet_speed", "hadley_edge_lat"], label="INVENTED-2")
    c = out.columns
    assert set(c["member"]) == {"r1i1p1f1", "r2i1p1f1"}
    lines = output.sorted_lines(out)
    assert lines[0] == "source,time,member,hemisphere,sector,metric,value,units,flag"
    assert lines[1].startswith("INVENTED-2,2000-01-15,r1i1p1f1,NH,zonal,eddy_jet_speed,")
    sel = (c["metric"] == "eddy_jet_speed") & (c["hemisphere"] == "NH")
    one = c["value"][sel & (c["member"] == "r1i1p1f1")]
    two = c["value"][sel & (c["member"] == "r2i1p1f1")]
    assert np.allclose(two - one, 1.0, atol=0.02)                  # member 2 has u + 1 m/s
    assert set(out.provenance["members"]) == {"r1i1p1f1", "r2i1p1f1"}
    # each member alone gives the same rows as within the ensemble
    alone = engine.track([a], cfg, metric_ids=["eddy_jet_speed", "hadley_edge_lat"], label="INVENTED-2")
    assert "member" not in alone.columns
    mine = [ln for ln in lines[1:] if ",r1i1p1f1," in ln]
    assert [ln.replace(",r1i1p1f1,", ",") for ln in mine] == output.sorted_lines(alone)[1:]
