"""Sweeps on a Dask scheduler that requires mutual TLS.

A throwaway certificate authority and one certificate for scheduler, worker
and client are made here with the ``cryptography`` package (X.509 as in
RFC 5280), and a local Dask cluster (the ``distributed`` package, an outside
implementation) listens on ``tls://127.0.0.1`` with Dask's own security
configuration. A sweep through it must store the same records as a serial
run; missing or wrong certificates must fail before anything runs, in one
line, naming the option.
"""

import datetime
import os

import pytest
import yaml

distributed = pytest.importorskip("distributed")
x509 = pytest.importorskip("cryptography.x509")

from cryptography.hazmat.primitives import hashes, serialization  # noqa: E402
from cryptography.hazmat.primitives.asymmetric import ec  # noqa: E402
from cryptography.x509.oid import NameOID  # noqa: E402

from sim.cli import main  # noqa: E402
from sim.sweep import open_store, run_sweep  # noqa: E402
from sim.sweep.backends import TLSFiles  # noqa: E402
from sim.sweep.store import dumps  # noqa: E402
from sim.trace.files import save_trace  # noqa: E402
from sim.trace.synth import synth_trace  # noqa: E402

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
MID = os.path.join(ROOT, "arch_configs", "mid.yaml")


def _name(cn):
    return x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, cn)])


def make_ca_and_cert(folder, tag):
    """A CA and a certificate it signs (for 127.0.0.1); returns (ca.pem, cert.pem, key.pem)."""
    now = datetime.datetime.now(datetime.timezone.utc)
    ca_key = ec.generate_private_key(ec.SECP256R1())
    ca = (x509.CertificateBuilder().subject_name(_name(f"test CA {tag}")).issuer_name(_name(f"test CA {tag}"))
          .public_key(ca_key.public_key()).serial_number(x509.random_serial_number())
          .not_valid_before(now - datetime.timedelta(minutes=5)).not_valid_after(now + datetime.timedelta(days=1))
          .add_extension(x509.BasicConstraints(ca=True, path_length=None), critical=True)
          .add_extension(x509.KeyUsage(digital_signature=True, key_cert_sign=True, crl_sign=True,
                                       content_commitment=False, key_encipherment=False, data_encipherment=False,
                                       key_agreement=False, encipher_only=False, decipher_only=False),
                         critical=True)
          .sign(ca_key, hashes.SHA256()))
    key = ec.generate_private_key(ec.SECP256R1())
    import ipaddress
    cert = (x509.CertificateBuilder().subject_name(_name("attnsim test node")).issuer_name(ca.subject)
            .public_key(key.public_key()).serial_number(x509.random_serial_number())
            .not_valid_before(now - datetime.timedelta(minutes=5)).not_valid_after(now + datetime.timedelta(days=1))
            .add_extension(x509.SubjectAlternativeName([x509.IPAddress(ipaddress.ip_address("127.0.0.1")),
                                                        x509.DNSName("localhost")]), critical=False)
            .add_extension(x509.BasicConstraints(ca=False, path_length=None), critical=True)
            .sign(ca_key, hashes.SHA256()))
    paths = [os.path.join(folder, f"{tag}-{n}.pem") for n in ("ca", "cert", "key")]
    with open(paths[0], "wb") as fh:
        fh.write(ca.public_bytes(serialization.Encoding.PEM))
    with open(paths[1], "wb") as fh:
        fh.write(cert.public_bytes(serialization.Encoding.PEM))
    with open(paths[2], "wb") as fh:
        fh.write(key.private_bytes(serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8,
                                   serialization.NoEncryption()))
    return paths


@pytest.fixture(scope="module")
def pki(tmp_path_factory):
    d = str(tmp_path_factory.mktemp("pki"))
    return {"good": make_ca_and_cert(d, "good"), "other": make_ca_and_cert(d, "other")}


@pytest.fixture(scope="module")
def tls_cluster(pki):
    ca, cert, key = pki["good"]
    sec = distributed.Security(tls_ca_file=ca, tls_scheduler_cert=cert, tls_scheduler_key=key,
                               tls_worker_cert=cert, tls_worker_key=key, tls_client_cert=cert,
                               tls_client_key=key, require_encryption=True)
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=True, host="127.0.0.1",
                                  protocol="tls://", security=sec, dashboard_address=None) as c:
        assert c.scheduler_address.startswith("tls://")
        yield c


@pytest.fixture(scope="module")
def spec(tmp_path_factory):
    d = tmp_path_factory.mktemp("tls")
    t = d / "t.npz"
    save_trace(synth_trace(prompt_tokens=64, decode_steps=2, layers=2, heads=2, head_dim=64,
                           token_keep=0.75, seed=4), str(t))
    s = d / "s.yaml"
    s.write_text(yaml.safe_dump({"name": "tls", "base": MID, "traces": [str(t)],
                                 "axes": {"dot.multipliers": [512, 1024, 2048]}}))
    return str(s)


def records(out):
    with open_store(out) as st:
        return sorted(dumps(r) for r in st.records())


def one_line(capsys, argv):
    capsys.readouterr()
    assert main(argv) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1, err
    return err


def test_sweep_over_mutual_tls_matches_a_serial_run(tmp_path, tls_cluster, pki, spec):
    ca, cert, key = pki["good"]
    tls = TLSFiles(ca, cert, key)
    run = run_sweep(spec, str(tmp_path / "tls"), cluster=tls_cluster.scheduler_address, security=tls, quiet=True)
    assert run.executed == 3 and run.backend.startswith("dask at tls://127.0.0.1:")
    run_sweep(spec, str(tmp_path / "serial"), jobs=1, quiet=True)
    assert records(str(tmp_path / "tls")) == records(str(tmp_path / "serial"))


def test_command_line_tls_options(tmp_path, tls_cluster, pki, spec, capsys):
    ca, cert, key = pki["good"]
    addr = tls_cluster.scheduler_address
    assert main(["sweep", spec, "--out", str(tmp_path / "o"), "--cluster", addr, "--cluster-ca", ca,
                 "--cluster-cert", cert, "--cluster-key", key, "--quiet"]) == 0
    # a client whose CA did not sign the scheduler's certificate is refused
    oca, ocert, okey = pki["other"]
    line = one_line(capsys, ["sweep", spec, "--out", str(tmp_path / "o2"), "--cluster", addr,
                             "--cluster-ca", oca, "--cluster-cert", ocert, "--cluster-key", okey])
    assert addr in line and "no Dask scheduler answered" in line and "CA" in line


def test_bad_tls_inputs_fail_before_running(tmp_path, pki, spec, capsys):
    ca, cert, key = pki["good"]
    out = str(tmp_path / "o")
    line = one_line(capsys, ["sweep", spec, "--out", out, "--cluster", "tls://127.0.0.1:1",
                             "--cluster-ca", str(tmp_path / "missing.pem"), "--cluster-cert", cert])
    assert "--cluster-ca" in line and "missing.pem" in line and "file not found" in line
    line = one_line(capsys, ["sweep", spec, "--out", out, "--cluster", "tcp://127.0.0.1:1",
                             "--cluster-ca", ca, "--cluster-cert", cert])
    assert "tls://" in line and "--cluster-ca" in line
    line = one_line(capsys, ["sweep", spec, "--out", out, "--cluster-cert", cert])
    assert "--cluster-cert" in line and "--cluster" in line
    import dask.config
    with dask.config.set({"distributed.comm.tls.ca-file": None, "distributed.comm.tls.client.cert": None}):
        line = one_line(capsys, ["sweep", spec, "--out", out, "--cluster", "tls://127.0.0.1:1"])
    assert "needs a CA and a client certificate" in line and "--cluster-ca" in line
    line = one_line(capsys, ["sweep", spec, "--out", out, "--cluster", "udp://127.0.0.1:1"])
    assert "tls://HOST:PORT" in line
    assert not os.path.exists(out)        # nothing ran, no folder was made
