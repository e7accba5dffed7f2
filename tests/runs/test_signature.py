"""Signed runs: SHA256SUMS signed with an SSH key made in the test (``run --sign``) and
checked against an allowed-signers file (``verify --allowed-signers``), so that a list
written again after an edit no longer passes as the signed one.

Reference: OpenSSH's ssh-keygen(1) (``-Y sign``, ``-Y verify``, "ALLOWED SIGNERS"); the
signature is also checked with ssh-keygen alone, as an auditor without reportgen would."""

from __future__ import annotations

import json
import shutil
import subprocess
from pathlib import Path

import pytest

from reportgen.cli import main
from reportgen.inputs.files import sha256_file
from reportgen.runs.integrity import checksum_list, run_files

pytestmark = [
    pytest.mark.slow,
    pytest.mark.skipif(shutil.which("ssh-keygen") is None, reason="OpenSSH ssh-keygen absent"),
]

ROOT = Path(__file__).resolve().parents[2]


def _key(folder: Path, name: str, passphrase: str = "") -> tuple[Path, str]:
    """A new ed25519 key and its allowed-signers line (principal ``name``)."""
    key = folder / name
    subprocess.run(
        ["ssh-keygen", "-q", "-t", "ed25519", "-N", passphrase, "-C", name, "-f", str(key)],
        check=True,
        capture_output=True,
    )
    kind, blob = Path(f"{key}.pub").read_text().split()[:2]
    return key, f"{name} {kind} {blob}\n"


@pytest.fixture(scope="module")
def signed(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path, Path]:
    """(a run signed by analyst@example.org, the allowed-signers file naming that key, the
    key of someone else)."""
    base = tmp_path_factory.mktemp("signed")
    for name in ("clinic_visits.yaml", "clinic_visits.csv"):
        shutil.copy(ROOT / "specs" / name, base / name)
    key, line = _key(base, "analyst@example.org")
    other, _ = _key(base, "someone-else@example.org")
    allowed = base / "allowed_signers"
    allowed.write_text(line)
    args = ["run", str(base / "clinic_visits.yaml"), "--out", str(base / "runs"), "--quiet"]
    assert main([*args, "--sign", str(key)]) == 0
    return base / "runs" / "clinic-visits" / "v001", allowed, other


def _copy(run: Path, name: str) -> Path:
    target = run.parent / name  # a sibling: the recorded spec source still resolves
    shutil.copytree(run, target)
    return target


def _verify(capsys: pytest.CaptureFixture[str], *args: str) -> tuple[int, str]:
    code = main(["verify", *args])
    return code, capsys.readouterr().out


def test_a_signed_run_verifies_with_its_signer_and_with_ssh_keygen_alone(
    signed: tuple[Path, Path, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    run, allowed, _ = signed
    assert (run / "SHA256SUMS.sig").read_bytes().startswith(b"-----BEGIN SSH SIGNATURE-----")
    code, out = _verify(capsys, str(run), "--allowed-signers", str(allowed))
    assert code == 0, out[-1500:]
    assert "signature: ok: SHA256SUMS signed by analyst@example.org" in out
    code, out = _verify(capsys, str(run))  # without the file: said, not a finding
    assert code == 0 and "signature: not checked: the run is signed; give --allowed-signers" in out
    check = ("-f", str(allowed), "-I", "analyst@example.org", "-n", "reportgen-run")
    alone = subprocess.run(
        ["ssh-keygen", "-Y", "verify", *check, "-s", str(run / "SHA256SUMS.sig")],
        input=(run / "SHA256SUMS").read_bytes(),
        capture_output=True,
    )
    assert alone.returncode == 0, alone.stderr
    assert b'Good "reportgen-run" signature for analyst@example.org' in alone.stdout


def _rehash(run: Path) -> None:
    names = [n for n in run_files(run) if n not in ("SHA256SUMS", "SHA256SUMS.sig")]
    (run / "SHA256SUMS").write_bytes(checksum_list({n: sha256_file(run / n) for n in names}))


def test_an_edit_with_every_list_written_again_fails_the_signature(
    signed: tuple[Path, Path, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    run, allowed, _ = signed
    forged = _copy(run, "rewritten")
    record = json.loads((forged / "record.json").read_text())
    record["run"]["author"] = "Someone Else"
    (forged / "record.json").write_text(json.dumps(record, indent=2) + "\n")
    _rehash(forged)
    code, out = _verify(capsys, str(forged), "--allowed-signers", str(allowed))
    assert code == 1
    assert (
        "signature: FAILED: the signature by analyst@example.org does not match SHA256SUMS" in out
    )


def test_a_signature_removed_or_made_with_another_key_fails(
    signed: tuple[Path, Path, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    run, allowed, other = signed
    unsigned = _copy(run, "unsigned")
    (unsigned / "SHA256SUMS.sig").unlink()
    code, out = _verify(capsys, str(unsigned), "--allowed-signers", str(allowed))
    assert code == 1 and "signature: FAILED: the run is not signed (SHA256SUMS.sig absent)" in out
    resigned = _copy(run, "resigned")
    (resigned / "SHA256SUMS.sig").unlink()
    subprocess.run(
        ["ssh-keygen", "-Y", "sign", "-f", str(other), "-n", "reportgen-run", "SHA256SUMS"],
        cwd=resigned,
        check=True,
        capture_output=True,
    )
    code, out = _verify(capsys, str(resigned), "--allowed-signers", str(allowed))
    assert code == 1
    assert "signature: FAILED: SHA256SUMS.sig is not by a key listed in allowed_signers" in out


def test_a_key_that_cannot_sign_stops_the_run_cleanly(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    for name in ("clinic_visits.yaml", "clinic_visits.csv"):
        shutil.copy(ROOT / "specs" / name, tmp_path / name)
    out = tmp_path / "runs"
    args = ["run", str(tmp_path / "clinic_visits.yaml"), "--out", str(out), "--quiet"]
    assert main([*args, "--sign", str(tmp_path / "no-such-key")]) == 2
    err = capsys.readouterr().err
    assert "--sign: no key file" in err and "Traceback" not in err
    locked, _ = _key(tmp_path, "locked@example.org", passphrase="a passphrase")
    assert main([*args, "--sign", str(locked)]) == 2  # no terminal, no agent: cannot sign
    err = capsys.readouterr().err
    assert "--sign: ssh-keygen could not sign" in err and "ssh-agent" in err
    left = sorted(p.name for p in out.rglob("*")) if out.exists() else []
    assert left in ([], ["clinic-visits"]), left  # no version, no .building folder
