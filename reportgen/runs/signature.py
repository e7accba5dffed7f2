"""An optional signature of a run's SHA256SUMS with the statistician's SSH key.

A checksum list proves nothing against someone who can write it again; a signature by a
key the auditor trusts does. The signature is OpenSSH's ("SSHSIG", ``ssh-keygen -Y sign``,
OpenSSH 8.1 and later; the format is described in OpenSSH's PROTOCOL.sshsig) over the
bytes of SHA256SUMS, in the namespace ``NAMESPACE``, stored beside it as ``SIGNATURE``;
it is checked against an allowed-signers file (``ssh-keygen -Y verify``; the file format
is that of ssh-keygen(1), "ALLOWED SIGNERS"). Anyone can check it without reportgen::

    ssh-keygen -Y verify -f allowed_signers -I <principal> -n reportgen-run \\
        -s SHA256SUMS.sig < SHA256SUMS

ssh-keygen is run as a program (no Python library needed): the OpenSSH client is a
system package on every platform that has one.
"""

from __future__ import annotations

import shutil
import subprocess
import tempfile
from pathlib import Path
from typing import NamedTuple

from ..errors import OutputError, RecordError
from .integrity import SIGNATURE

NAMESPACE = "reportgen-run"
_TIMEOUT = 60  # seconds; ssh-keygen asks nothing when it has what it needs


class SignatureCheck(NamedTuple):
    """``ok``: a good signature by ``signer``; else ``why`` says what failed."""

    ok: bool
    signer: str
    why: str


def _ssh_keygen(what: str) -> str:
    found = shutil.which("ssh-keygen")
    if found is None:
        raise RecordError(
            f"{what} needs ssh-keygen (the OpenSSH client), which is not installed here"
        )
    return found


def check_signing_key(key: Path) -> None:
    """Refuse before the fit a key that cannot sign (the run would be lost at the end)."""
    _ssh_keygen("--sign")
    if not key.is_file():
        raise OutputError(f"--sign: no key file {str(key)!r}")


def sign(sums: bytes, key: Path) -> bytes:
    """The SSHSIG signature of ``sums`` with the private ``key`` (or a public key whose
    private half an ssh-agent holds)."""
    program = _ssh_keygen("--sign")
    with tempfile.TemporaryDirectory(prefix="reportgen-sign-") as scratch:
        message = Path(scratch) / "SHA256SUMS"
        message.write_bytes(sums)
        try:
            done = subprocess.run(
                [program, "-Y", "sign", "-f", str(key), "-n", NAMESPACE, str(message)],
                stdin=subprocess.DEVNULL,
                capture_output=True,
                timeout=_TIMEOUT,
                start_new_session=True,  # no terminal to ask a passphrase on: fail, not wait
            )
        except subprocess.TimeoutExpired as e:
            raise OutputError(
                f"--sign: ssh-keygen did not sign within {_TIMEOUT} s (a key with a "
                "passphrase needs an ssh-agent that holds it)"
            ) from e
        signature = message.with_name("SHA256SUMS.sig")
        if done.returncode != 0 or not signature.is_file():
            said = done.stderr.decode("utf-8", errors="replace").strip().splitlines()
            raise OutputError(
                f"--sign: ssh-keygen could not sign with {str(key)!r}: "
                f"{said[-1] if said else 'no reason given'} (a key with a passphrase needs "
                "an ssh-agent that holds it)"
            )
        return signature.read_bytes()


def check(sums: bytes, signature: bytes, allowed_signers: Path) -> SignatureCheck:
    """Is ``signature`` a good signature of ``sums`` by a key of ``allowed_signers``?"""
    program = _ssh_keygen("checking a signature")
    if not allowed_signers.is_file():
        raise RecordError(f"--allowed-signers: no file {str(allowed_signers)!r}")
    with tempfile.TemporaryDirectory(prefix="reportgen-check-") as scratch:
        sig = Path(scratch) / SIGNATURE
        sig.write_bytes(signature)
        base = [program, "-Y"]
        found = subprocess.run(
            [*base, "find-principals", "-s", str(sig), "-f", str(allowed_signers)],
            stdin=subprocess.DEVNULL,
            capture_output=True,
            timeout=_TIMEOUT,
        )
        principals = found.stdout.decode("utf-8", errors="replace").split()
        if found.returncode != 0 or not principals:
            return SignatureCheck(
                False, "", f"{SIGNATURE} is not by a key listed in {allowed_signers.name}"
            )
        tail = ("-n", NAMESPACE, "-s", str(sig))
        for principal in principals:
            done = subprocess.run(
                [*base, "verify", "-f", str(allowed_signers), "-I", principal, *tail],
                input=sums,
                capture_output=True,
                timeout=_TIMEOUT,
            )
            if done.returncode == 0:
                return SignatureCheck(True, principal, "")
        return SignatureCheck(
            False,
            principals[0],
            f"the signature by {principals[0]} does not match SHA256SUMS "
            "(the list was changed after it was signed)",
        )
