"""Throwaway TLS files for a private broker, made with the ``openssl`` command line.

:func:`make_tls_files` writes a certificate authority, a broker certificate it signs for
``IP:127.0.0.1`` only (so ``localhost`` does not match it), and a second, unrelated
authority, all valid for two days (X.509, RFC 5280; subjectAltName, section 4.2.1.6).
:func:`make_password_file` writes a Mosquitto password file with ``mosquitto_passwd``.
Both skip the test when the program is missing.
"""

from __future__ import annotations

import shutil
import subprocess
from dataclasses import dataclass
from pathlib import Path

import pytest


@dataclass(frozen=True)
class TlsFiles:
    ca: Path  # the authority that signed the broker's certificate
    other_ca: Path  # an authority the broker's certificate has nothing to do with
    cert: Path  # the broker's certificate, subjectAltName IP:127.0.0.1
    key: Path


def _run(*args: str) -> None:
    done = subprocess.run(args, capture_output=True, text=True, timeout=60)
    assert done.returncode == 0, done.stderr


def _self_signed(openssl: str, key: Path, cert: Path, name: str) -> None:
    _run(openssl, "req", "-x509", "-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1",
         "-nodes", "-keyout", str(key), "-out", str(cert), "-days", "2", "-subj", f"/CN={name}",
         "-addext", "basicConstraints=critical,CA:TRUE", "-addext", "keyUsage=critical,keyCertSign")


def make_tls_files(directory: Path) -> TlsFiles:
    openssl = shutil.which("openssl")
    if openssl is None:
        pytest.skip("the openssl command is not installed (apt-get install openssl)")
    d = Path(directory)
    d.mkdir(parents=True, exist_ok=True)
    _self_signed(openssl, d / "ca.key", d / "ca.pem", "whirlwatch test CA")
    _self_signed(openssl, d / "other-ca.key", d / "other-ca.pem", "unrelated test CA")
    _run(openssl, "req", "-new", "-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes",
         "-keyout", str(d / "broker.key"), "-out", str(d / "broker.csr"), "-subj", "/CN=test broker")
    (d / "broker.ext").write_text("subjectAltName=IP:127.0.0.1\nextendedKeyUsage=serverAuth\n")
    _run(openssl, "x509", "-req", "-in", str(d / "broker.csr"), "-CA", str(d / "ca.pem"),
         "-CAkey", str(d / "ca.key"), "-CAcreateserial", "-out", str(d / "broker.pem"), "-days", "2",
         "-extfile", str(d / "broker.ext"))
    return TlsFiles(ca=d / "ca.pem", other_ca=d / "other-ca.pem", cert=d / "broker.pem", key=d / "broker.key")


def make_password_file(path: Path, user: str, password: str) -> Path:
    tool = shutil.which("mosquitto_passwd")
    if tool is None:
        pytest.skip("mosquitto_passwd is not installed (it comes with the mosquitto package)")
    path.write_text("")
    _run(tool, "-b", str(path), user, password)
    return path
