"""Campaign manifests: choices are checked when the manifest is read, with the file and the place
named (common practice: fail before hours of work, not in the middle of them)."""

import pytest

from diffkit.errors import InputError
from diffkit.io.manifest import read_manifest

RUN = '[[candidates.runs]]\nfiles = ["a.xdatcar"]\n'

BAD = [
    ("reference", '[settings]\nreference = "centre"\n[[candidates]]\nname = "a"\n' + RUN,
     ["[settings]", "reference", "centre", "framework"]),
    ("candidate_reference", '[[candidates]]\nname = "a"\nreference = 3\n' + RUN,
     ["candidate 'a'", "reference"]),
    ("format", '[[candidates]]\nname = "a"\n' + RUN + 'format = "pdb"\n',
     ["candidate 'a', run 1", "format", "pdb", "xdatcar"]),
    ("lammps_units", '[[candidates]]\nname = "a"\n' + RUN + 'lammps_units = "lj"\n',
     ["candidate 'a', run 1", "lammps_units", "metal"]),
    ("method", '[settings]\nmethod = ""\n[[candidates]]\nname = "a"\n' + RUN,
     ["[settings]", "method"]),
]


@pytest.mark.parametrize("case,text,words", BAD, ids=[b[0] for b in BAD])
def test_bad_choices_are_refused_naming_file_and_place(tmp_path, case, text, words):
    path = tmp_path / f"{case}.toml"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(InputError) as info:
        read_manifest(path)
    msg = str(info.value)
    assert msg.startswith(str(path)), msg
    for w in words:
        assert w in msg, (w, msg)


def test_choices_are_normalised(tmp_path):
    path = tmp_path / "ok.toml"
    path.write_text('[settings]\nreference = "None"\nmethod = "GLS"\n[[candidates]]\nname = "a"\n'
                    + RUN + 'format = "XDATCAR"\nlammps_units = "Metal"\n', encoding="utf-8")
    m = read_manifest(path)
    c = m.candidates[0]
    assert c.settings["reference"] == "none" and c.settings["method"] == "gls"
    assert c.runs[0].format == "xdatcar" and c.runs[0].lammps_units == "metal"


def test_unknown_diffusion_method_stops_the_campaign_before_any_run(tmp_path):
    from diffkit.campaign import run_campaign

    path = tmp_path / "m.toml"
    path.write_text('[settings]\nmethod = "magic"\n[[candidates]]\nname = "a"\n' + RUN,
                    encoding="utf-8")
    with pytest.raises(InputError) as info:
        run_campaign(str(path), str(tmp_path / "out"), workers=1)
    msg = str(info.value)
    assert msg.startswith(str(path)) and "'a'" in msg and "magic" in msg and "gls" in msg
    assert not (tmp_path / "out" / "runs").exists()
