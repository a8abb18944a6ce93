"""Damaged inputs through the command line: exit 2 with one line, or a sound result.

A fixed-seed subset of the input fuzzer (:mod:`hopwell.bench.fuzz`; the full run is a benchmark,
see the contributor guide), the fuzzer's own classification, and one regression test for each
fault it found in the input readers.
"""

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, Phase, given, settings
from rdkit import Chem
from rdkit.Chem import AllChem

from hopwell.bench.damage import FuzzInput
from hopwell.bench.fuzz import PASSING, Case, cases, classify, draw_cases, run_case
from hopwell.errors import InputError
from hopwell.systems import textfile
from hopwell.systems.inputs import read_input

TIMEOUT_S = 90.0
FIXED_SEED = settings(derandomize=True, database=None, deadline=None,
                      phases=[Phase.explicit, Phase.generate],  # a failure prints its case; no shrinking
                      suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large,
                                             HealthCheck.large_base_example])


def _explain(outcome):
    return f"{outcome.outcome}: {outcome.why}\n{outcome.stderr[-1500:]}\n{outcome.traceback[-1500:]}"


@settings(FIXED_SEED, max_examples=40)
@given(case=cases(("build", "energy")))
def test_build_and_energy_never_fail_untidily(case):
    outcome = run_case(case, TIMEOUT_S)
    assert outcome.outcome in PASSING, _explain(outcome)


@settings(FIXED_SEED, max_examples=6)
@given(case=cases(("run",)))
def test_short_run_never_fails_untidily(case):
    outcome = run_case(case, TIMEOUT_S)
    assert outcome.outcome in PASSING, _explain(outcome)


# ---- the classification the fuzz tests rely on ---------------------------------------------------

@pytest.mark.parametrize(
    ("returncode", "stderr", "expected"),
    [
        (2, "hopwell: error: input.sdf: no molecule records found\n", "clean error"),
        (2, "UserWarning: duplicate atom\nhopwell: error: input.pdb: cannot read PDB\n", "messy error"),
        (2, "Usage: hopwell build [OPTIONS] INPUT\nError: No such option: -x\n", "messy error"),
        (2, "hopwell: error: Element 'H \x1d' not found\n", "messy error"),
        (2, "hopwell: error: no newline at the end", "messy error"),
        (1, "hopwell: internal error; the traceback is in /tmp/x.log\n", "traceback"),
        (2, "Traceback (most recent call last):\nhopwell: error: x\n", "traceback"),
        (-11, "", "crash"),
        (3, "", "crash"),
    ],
)
def test_failed_commands_are_classified(returncode, stderr, expected, tmp_path):
    assert classify("build", returncode, "", stderr, tmp_path)[0] == expected


@pytest.mark.parametrize(
    ("command", "stdout", "expected"),
    [
        ("energy", json.dumps({"unit": "kJ/mol", "energies": [1.5, -3.0]}), "ok"),
        ("energy", '{"unit": "kJ/mol", "energies": [NaN]}', "bad result"),
        ("energy", json.dumps({"unit": "kJ/mol", "energies": []}), "bad result"),
        ("build", json.dumps({"atoms": 9, "seeds": 2, "seed_energies_kj_per_mol": [1.0]}), "bad result"),
        ("build", "formula C2H6O", "bad result"),
    ],
)
def test_results_are_checked(command, stdout, expected, tmp_path):
    assert classify(command, 0, stdout, "", tmp_path)[0] == expected


def test_a_run_without_run_directory_is_a_bad_result(tmp_path):
    assert classify("run", 0, "", "run finished at cycle 2: 2 production samples in run\n", tmp_path)[0] == "bad result"


def test_a_case_past_its_timeout_is_a_hang():
    case = Case(FuzzInput("smiles", b"CCO", ()), "build")
    assert run_case(case, timeout_s=0.05).outcome == "hang"


def test_a_valid_input_passes_as_ok():
    case = Case(FuzzInput("smiles", b"CCO", ()), "energy")
    outcome = run_case(case, TIMEOUT_S)
    assert outcome.outcome == "ok", _explain(outcome)


# ---- regressions: faults the fuzzer found --------------------------------------------------------

@pytest.mark.parametrize("smiles", ["CC\udce1O", "CCO\u00e9", "C\U0010d44eC"])
def test_smiles_with_non_ascii_characters_is_refused(smiles):
    # Were a UnicodeEncodeError (bytes that are not UTF-8 reach Python as surrogates) and a
    # SystemError from RDKit (other non-ASCII characters).
    with pytest.raises(InputError, match="printable ASCII"):
        read_input(smiles)


def test_undecodable_smiles_bytes_exit_2_with_one_line():
    proc = subprocess.run([sys.executable, "-m", "hopwell.cli", "build", "--", b"CC\xe1O"],
                          capture_output=True, check=False)
    assert proc.returncode == 2 and proc.stderr.count(b"\n") == 1, proc.stderr


@pytest.fixture()
def peptide_lines(systems_dir):
    text = (systems_dir / "ace_ala_nme.pdb").read_text()
    return [line for line in text.splitlines(keepends=True) if line.startswith(("ATOM", "HETATM"))]


def test_pdb_with_a_repeated_atom_is_refused(peptide_lines, tmp_path):
    # OpenMM's reader only warned (a multi-line stderr), then failed elsewhere.
    path = tmp_path / "dup.pdb"
    path.write_text("".join(peptide_lines[:5] + [peptide_lines[4]] + peptide_lines[5:]) + "END\n")
    with pytest.raises(InputError, match=r"line 6 repeats atom CA of residue ALA 2 \(line 5\)"):
        read_input(str(path))


def test_pdb_with_two_residues_sharing_a_number_is_refused(peptide_lines, tmp_path):
    renamed = [line[:17] + "GLY" + line[20:] if i == 5 else line for i, line in enumerate(peptide_lines)]
    path = tmp_path / "renamed.pdb"
    path.write_text("".join(renamed) + "END\n")
    with pytest.raises(InputError, match="residues ALA and GLY in a row share the number 2"):
        read_input(str(path))


def test_pdb_atoms_on_one_point_are_refused_before_hydrogens_are_added(peptide_lines, tmp_path):
    # Was "cannot add hydrogens: 0.0 cannot be raised to a negative power".
    squashed = [line[:30] + "   0.000   0.000   0.000" + line[54:] for line in peptide_lines]
    path = tmp_path / "squashed.pdb"
    path.write_text("".join(squashed) + "END\n")
    with pytest.raises(InputError, match=r"model 1 has atoms 1 and 2 0.00 A apart \(overlapping\)"):
        read_input(str(path))


def _sdf_text(smiles="CC(=O)NC"):
    mol = Chem.AddHs(Chem.MolFromSmiles(smiles))
    AllChem.EmbedMolecule(mol, randomSeed=3)
    return Chem.MolToMolBlock(mol) + "$$$$\n"


def test_binary_files_are_refused(tmp_path):
    path = tmp_path / "m.sdf"
    path.write_bytes(_sdf_text().encode("utf-16"))
    with pytest.raises(InputError, match="NUL byte on line 2: a binary file or UTF-16"):
        read_input(str(path))


def test_oversize_files_are_refused(tmp_path, monkeypatch):
    monkeypatch.setattr(textfile, "MAX_FILE_BYTES", 100)
    path = tmp_path / "m.sdf"
    path.write_text(_sdf_text())
    with pytest.raises(InputError, match="larger than the limit"):
        read_input(str(path))


@pytest.mark.parametrize("encoding", ["latin-1", "utf-8", "utf-8-sig"])
def test_non_ascii_titles_read_in_any_encoding(encoding, tmp_path):
    text = _sdf_text().replace("RDKit", "R\u00e9Kit")
    path = tmp_path / "m.sdf"
    path.write_bytes(text.encode(encoding))
    xyz = read_input(str(path)).mol.GetConformer().GetPositions()
    expected = Chem.MolFromMolBlock(_sdf_text(), removeHs=False).GetConformer().GetPositions()
    np.testing.assert_allclose(xyz, expected)


def test_a_non_ascii_character_in_an_atom_line_is_a_clean_error(tmp_path):
    # Was a SystemError: RDKit's message quoted half of the character's UTF-8 bytes.
    lines = _sdf_text().splitlines(keepends=True)
    lines[5] = lines[5][:33] + "\u0463" + lines[5][33:]  # in the element field
    path = tmp_path / "m.sdf"
    path.write_text("".join(lines))
    with pytest.raises(InputError, match=r"record 1 cannot be read: ERROR: Element 'C \?' not found"):
        read_input(str(path))


@pytest.mark.parametrize("line_end", ["\r\n", "\r"])
def test_crlf_and_cr_files_read_like_lf(line_end, tmp_path):
    text = _sdf_text()
    path = tmp_path / "m.sdf"
    path.write_text(text.replace("\n", line_end), newline="")
    xyz = read_input(str(path)).mol.GetConformer().GetPositions()
    expected = Chem.MolFromMolBlock(text, removeHs=False).GetConformer().GetPositions()
    np.testing.assert_allclose(xyz, expected)


def _with_first_atom_at(text, x_text):
    lines = text.splitlines(keepends=True)
    lines[4] = x_text.rjust(10) + lines[4][10:]
    return "".join(lines)


@pytest.mark.parametrize(
    ("x_text", "message"),
    [
        # Was "record 1 cannot be read: ERROR: moving to the beginning of the next molecule".
        ("1e30", "record 1 cannot be read: ERROR: Cannot process coordinates on line 5"),
        ("99.0", "bonded atoms 1 and 2 .* A apart; the coordinates do not fit the bonds"),
    ],
)
def test_absurd_sdf_coordinates_are_refused(x_text, message, tmp_path):
    path = tmp_path / "m.sdf"
    path.write_text(_with_first_atom_at(_sdf_text(), x_text))
    with pytest.raises(InputError, match=message):
        read_input(str(path))


@pytest.mark.parametrize(
    ("x_text", "message"),
    [("1e30", r"model 1 has atom 1 at a coordinate of 1e\+30 A"),
     ("nan", "model 1 has non-finite coordinates at atom 1")],
)
def test_absurd_pdb_coordinates_are_refused(peptide_lines, x_text, message, tmp_path):
    lines = [line[:30] + x_text.rjust(8) + line[38:] if i == 0 else line for i, line in enumerate(peptide_lines)]
    path = tmp_path / "far.pdb"
    path.write_text("".join(lines) + "END\n")
    with pytest.raises(InputError, match=message):
        read_input(str(path))


def test_valid_shipped_mol2_reads(systems_dir):
    assert read_input(str(Path(systems_dir) / "nma.mol2")).mol.GetNumAtoms() == 12


def test_a_name_too_long_to_look_up_is_no_file():
    # Was OSError "File name too long" from Path.is_file().
    with pytest.raises(InputError, match="no such file"):
        read_input("C" * 300 + ".sdf")


def test_an_unreadable_file_is_refused(tmp_path, monkeypatch):
    path = tmp_path / "m.sdf"
    path.write_text(_sdf_text())

    def refuse(self):
        raise PermissionError(13, "Permission denied")

    monkeypatch.setattr(Path, "read_bytes", refuse)
    with pytest.raises(InputError, match="m.sdf: cannot read the file: Permission denied"):
        read_input(str(path))


def test_rdkit_warnings_stay_off_stderr(tmp_path, capfd):
    # A proton without neighbours made RDKit print a warning before the one-line error.
    lines = _sdf_text().splitlines(keepends=True)
    n_atoms = int(lines[3][:3])
    proton = "    5.0000    5.0000    5.0000 H   0  0  0  0  0  0  0  0  0  0  0  0\n"
    lines[3] = f"{n_atoms + 1:>3}" + lines[3][3:]
    lines.insert(4 + n_atoms, proton)
    lines.insert(lines.index("M  END\n"), f"M  CHG  1 {n_atoms + 1:>3}   1\n")
    path = tmp_path / "m.sdf"
    path.write_text("".join(lines))
    with pytest.raises(InputError, match="2 disconnected molecules"):
        read_input(str(path))
    assert capfd.readouterr().err == ""


def test_drawn_cases_are_distinct_and_repeat_with_their_seed():
    first, again, other = draw_cases(60, 3), draw_cases(60, 3), draw_cases(60, 4)
    assert first == again and first != other
    assert len({(c.input.fmt, c.input.data, c.command) for c in first}) == 60


@pytest.mark.parametrize(
    ("count", "message"),
    [("-1", "must begin with the number of atoms, not '-1'"),
     ("4000000000", "gives 4000000000 atoms; hopwell reads 1 to 300")],
)
def test_mol2_atom_count_is_checked_before_rdkit_reads_it(count, message, systems_dir, tmp_path):
    # Was RDKit reserving some 16 GB for the count (the process killed for memory).
    lines = (systems_dir / "nma.mol2").read_text().splitlines(keepends=True)
    head = lines.index("@<TRIPOS>MOLECULE\n")
    lines[head + 2] = count + lines[head + 2][2:]
    path = tmp_path / "m.mol2"
    path.write_text("".join(lines))
    with pytest.raises(InputError, match=message):
        read_input(str(path))


def test_a_case_past_its_memory_limit_fails():
    outcome = run_case(Case(FuzzInput("smiles", b"CCO", ()), "build"), TIMEOUT_S, max_rss_mb=1.0)
    assert outcome.outcome == "memory" and outcome.peak_mb > 1.0


def test_a_pdb_over_the_atom_limit_is_refused_before_its_coordinates_are_checked(systems_dir, tmp_path):
    # Was a pairwise distance matrix of all 11000 atoms (6.8 GB), then "overlapping".
    path = tmp_path / "many.pdb"
    path.write_text((systems_dir / "ace_ala_nme.pdb").read_text() * 1100)
    with pytest.raises(InputError, match="11000 atoms exceeds the limit of 300"):
        read_input(str(path))


def test_error_messages_quote_the_input_printably(tmp_path):
    # Was a control character from the file in the one-line message.
    lines = _sdf_text().splitlines(keepends=True)
    lines[5] = lines[5][:33] + "\x1d" + lines[5][34:]  # the element field
    path = tmp_path / "m.sdf"
    path.write_text("".join(lines))
    with pytest.raises(InputError) as caught:
        read_input(str(path))
    assert str(caught.value).isprintable() and "\\x1d" in str(caught.value)
