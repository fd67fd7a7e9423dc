"""The last line of defence and exit status 3: an emitted region that does not parse is an
internal error, and nothing is written."""
from __future__ import annotations

import shutil

import pytest
from conftest import SAMPLES, headline, run_cli

from looptile import emit, pipeline
from looptile.errors import InternalError
from looptile.flags import CompileFlags
from looptile.transform.tile import TileRequest

pytestmark = pytest.mark.cc


def _tile_sample():
    tu = pipeline.load(str(SAMPLES / "tracer_mix.c"), CompileFlags())
    req = TileRequest(((None, 32), (None, 32), (None, 32)))
    return tu, pipeline.tile(tu, "mix_tracers", req, pipeline.TileOptions(command="test"))


def test_region_check_accepts_the_real_rewrite_and_catches_a_broken_one():
    tu, out = _tile_sample()
    text = out.new[out.nest.start:].decode("latin-1")
    pipeline.check_parses(tu, out.nest, text, out.new)  # the real rewrite parses
    broken = out.new.replace(b"if (n - ii >= 32", b"if (n - ii >= 32 {", 1)
    assert broken != out.new
    with pytest.raises(InternalError):
        pipeline.check_parses(tu, out.nest, text, broken)


def test_a_template_bug_is_an_internal_error_and_writes_nothing(tmp_path, monkeypatch):
    src = tmp_path / "tracer_mix.c"
    shutil.copy(SAMPLES / "tracer_mix.c", src)
    before = src.read_bytes()
    real = emit.render

    def broken_render(template, **values):
        text = real(template, **values)
        return text.replace(")", "", 1) if template == "tile_loop.c.j2" else text

    monkeypatch.setattr(emit, "render", broken_render)
    out = tmp_path / "out.c"
    r = run_cli("tile", src, "--nest", "mix_tracers", "--sizes", "32,32,32", "-o", out)
    assert r.exit_code == 3, r.stderr
    assert headline(r.stderr)["kind"] == "error"
    assert "looptile bug" in r.stderr
    assert not out.exists()
    r = run_cli("tile", src, "--nest", "mix_tracers", "--sizes", "32,32,32", "--in-place")
    assert r.exit_code == 3
    assert src.read_bytes() == before
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".looptile-")]  # no temporary left
