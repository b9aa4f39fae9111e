"""`shardsieve certs`: a development CA plus certificates and tokens for a local cluster.

Why: mutual TLS needs a CA, a certificate per node (its common name is the node id the
coordinator checks on the sync stream), one per coordinator and one for operator tools.
Making them should take one command, not an openssl recipe. The files are for development
and tests: the CA key sits next to the certificates; production CAs live elsewhere.
"""

from __future__ import annotations

import datetime
import ipaddress
import os
import secrets
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import click

from shardsieve.limits import node_id_problem

DEFAULT_HOSTS = ("localhost", "127.0.0.1", "::1")


@dataclass(frozen=True)
class IssuedFiles:
    """Paths written by `make_dev_pki` (relative names are stable: tests and docs rely on them)."""

    directory: Path
    ca: Path
    coordinator_cert: Path
    coordinator_key: Path
    operator_cert: Path
    operator_key: Path
    node_certs: dict[str, tuple[Path, Path]]
    node_tokens_file: Path | None
    node_token_files: dict[str, Path]
    admin_token_file: Path | None


RESERVED = frozenset({"ca", "coordinator", "operator", "admin", "node-tokens"})


def _check_id(node_id: str) -> None:
    """A certificate's common name is the node id, and its files are named after it: the id
    must follow the node id alphabet (docs/node.md, "Node ids") and clash with no other file."""
    problem = node_id_problem(node_id)
    if problem:
        raise click.BadParameter(problem)
    if node_id in RESERVED:
        raise click.BadParameter(f"node id {node_id!r} would clash with a file of the CA, coordinator or tools")


def _write(path: Path, data: bytes, private: bool) -> None:
    flags = os.O_WRONLY | os.O_CREAT | os.O_TRUNC
    fd = os.open(path, flags, 0o600 if private else 0o644)
    with os.fdopen(fd, "wb") as fh:
        fh.write(data)
    if private:
        os.chmod(path, 0o600)


def make_dev_pki(out: Path, node_ids: Sequence[str], *, hosts: Sequence[str] = DEFAULT_HOSTS,
                 days: int = 30, tokens: bool = True, force: bool = False) -> IssuedFiles:
    """Write ca.pem, coordinator.pem/-key.pem, operator.pem/-key.pem and <node-id>.pem/-key.pem
    for each node id into `out` (plus token files when `tokens`). ECDSA P-256 keys; every
    certificate carries the given hosts as subject alternative names and may act as TLS
    server and client. Refuses to overwrite unless `force`."""
    from cryptography import x509
    from cryptography.hazmat.primitives import hashes, serialization
    from cryptography.hazmat.primitives.asymmetric import ec
    from cryptography.x509.oid import ExtendedKeyUsageOID, NameOID

    for nid in node_ids:
        _check_id(nid)
    if len(set(node_ids)) != len(node_ids):
        raise click.BadParameter("a node id is listed twice")
    if not 1 <= days <= 3650:
        raise click.BadParameter(f"--days must be 1..3650, got {days}")
    out.mkdir(parents=True, exist_ok=True)
    if not force and (out / "ca.pem").exists():
        raise click.UsageError(f"{out / 'ca.pem'} exists; pass --force to replace every file in {out}")

    now = datetime.datetime.now(datetime.timezone.utc)
    start, end = now - datetime.timedelta(minutes=5), now + datetime.timedelta(days=days)
    sans: list[x509.GeneralName] = []
    for h in hosts:
        try:
            sans.append(x509.IPAddress(ipaddress.ip_address(h)))
        except ValueError:
            sans.append(x509.DNSName(h))

    def pem_key(key: ec.EllipticCurvePrivateKey) -> bytes:
        return key.private_bytes(serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8,
                                 serialization.NoEncryption())

    ca_key = ec.generate_private_key(ec.SECP256R1())
    ca_name = x509.Name([x509.NameAttribute(NameOID.ORGANIZATION_NAME, "shardsieve development"),
                         x509.NameAttribute(NameOID.COMMON_NAME, "shardsieve development CA")])
    ca_cert = (x509.CertificateBuilder().subject_name(ca_name).issuer_name(ca_name)
               .public_key(ca_key.public_key()).serial_number(x509.random_serial_number())
               .not_valid_before(start).not_valid_after(end)
               .add_extension(x509.BasicConstraints(ca=True, path_length=0), critical=True)
               .add_extension(x509.KeyUsage(digital_signature=True, key_cert_sign=True, crl_sign=True,
                                            content_commitment=False, key_encipherment=False,
                                            data_encipherment=False, key_agreement=False,
                                            encipher_only=False, decipher_only=False), critical=True)
               .sign(ca_key, hashes.SHA256()))

    def issue(common_name: str, stem: str) -> tuple[Path, Path]:
        key = ec.generate_private_key(ec.SECP256R1())
        names = list(sans)
        if common_name not in hosts:
            names.append(x509.DNSName(common_name))
        cert = (x509.CertificateBuilder()
                .subject_name(x509.Name([x509.NameAttribute(NameOID.ORGANIZATION_NAME, "shardsieve development"),
                                         x509.NameAttribute(NameOID.COMMON_NAME, common_name)]))
                .issuer_name(ca_name).public_key(key.public_key()).serial_number(x509.random_serial_number())
                .not_valid_before(start).not_valid_after(end)
                .add_extension(x509.BasicConstraints(ca=False, path_length=None), critical=True)
                .add_extension(x509.SubjectAlternativeName(names), critical=False)
                .add_extension(x509.ExtendedKeyUsage([ExtendedKeyUsageOID.SERVER_AUTH,
                                                      ExtendedKeyUsageOID.CLIENT_AUTH]), critical=False)
                .sign(ca_key, hashes.SHA256()))
        cert_path, key_path = out / f"{stem}.pem", out / f"{stem}-key.pem"
        _write(cert_path, cert.public_bytes(serialization.Encoding.PEM), private=False)
        _write(key_path, pem_key(key), private=True)
        return cert_path, key_path

    _write(out / "ca.pem", ca_cert.public_bytes(serialization.Encoding.PEM), private=False)
    _write(out / "ca-key.pem", pem_key(ca_key), private=True)
    coord = issue("coordinator", "coordinator")
    oper = issue("operator", "operator")
    nodes = {nid: issue(nid, nid) for nid in node_ids}
    tokens_file, token_files, admin_file = None, {}, None
    if tokens:
        node_tokens = {nid: secrets.token_urlsafe(32) for nid in node_ids}
        tokens_file = out / "node-tokens.txt"
        _write(tokens_file, ("# NODE_ID TOKEN: the coordinator's node-token-file\n" + "".join(
            f"{nid} {tok}\n" for nid, tok in node_tokens.items())).encode(), private=True)
        for nid, tok in node_tokens.items():
            token_files[nid] = out / f"{nid}.token"
            _write(token_files[nid], f"{tok}\n".encode(), private=True)
        admin_file = out / "admin.token"
        _write(admin_file, f"{secrets.token_urlsafe(32)}\n".encode(), private=True)
    return IssuedFiles(out, out / "ca.pem", coord[0], coord[1], oper[0], oper[1], nodes, tokens_file,
                       token_files, admin_file)


@click.command("certs", context_settings={"max_content_width": 110})
@click.option("--out", "out", required=True, type=click.Path(file_okay=False, path_type=Path),
              help="Directory to write the files into (created if missing).")
@click.option("--nodes", "count", type=click.IntRange(0, 1000), default=None,
              help="Make certificates for node-1 .. node-N (the ids a local cluster uses).")
@click.option("--node-id", "node_ids", multiple=True, metavar="ID", help="A node id to make a certificate for; repeatable.")
@click.option("--host", "hosts", multiple=True, metavar="NAME|IP",
              help="Subject alternative name on every certificate (default: localhost, 127.0.0.1, ::1); repeatable.")
@click.option("--days", type=int, default=30, show_default=True, help="Validity of every certificate in days (1..3650).")
@click.option("--no-tokens", is_flag=True, help="Do not write the per-node sync tokens and the admin token.")
@click.option("--force", is_flag=True, help="Replace files already in --out.")
def certs(out: Path, count: int | None, node_ids: tuple[str, ...], hosts: tuple[str, ...], days: int,
          no_tokens: bool, force: bool) -> None:
    """Make a development CA and certificates for a local cluster: one per node (common name =
    node id, which the coordinator checks against the sync stream under mutual TLS), one for
    the coordinator and one for operator tools, plus random sync and admin tokens.

    For development and tests only: the CA key (ca-key.pem) is written next to the certificates.
    """
    ids = [f"node-{i + 1}" for i in range(count or 0)] + list(node_ids)
    if not ids:
        raise click.UsageError("name the nodes with --nodes N or --node-id ID")
    files = make_dev_pki(out, ids, hosts=hosts or DEFAULT_HOSTS, days=days, tokens=not no_tokens, force=force)
    click.echo(f"wrote a development CA and {len(ids) + 2} certificates to {files.directory}:")
    click.echo(f"  CA                {files.ca.name}  (ca-key.pem signs; keep it away from production)")
    click.echo(f"  coordinator       {files.coordinator_cert.name} / {files.coordinator_key.name}")
    click.echo(f"  operator tools    {files.operator_cert.name} / {files.operator_key.name}")
    for nid, (c, k) in files.node_certs.items():
        click.echo(f"  node {nid:<12} {c.name} / {k.name}")
    if files.node_tokens_file is not None:
        click.echo(f"  sync tokens       {files.node_tokens_file.name} (coordinator), <node-id>.token (each node)")
        click.echo(f"  admin token       {files.admin_token_file.name if files.admin_token_file else ''}")
    d = files.directory
    click.echo("\nmutual TLS, e.g.:")
    click.echo(f"  shardsieve coordinator --tls-cert {d}/coordinator.pem --tls-key {d}/coordinator-key.pem "
               f"--tls-ca {d}/ca.pem --tls-client-auth true")
    first = ids[0]
    click.echo(f"  shardsieve node --id {first} --tls-cert {d}/{first}.pem --tls-key {d}/{first}-key.pem "
               f"--tls-ca {d}/ca.pem --coordinator 127.0.0.1:7400 ...")
    click.echo(f"  shardsieve status --tls-ca {d}/ca.pem --tls-cert {d}/operator.pem --tls-key {d}/operator-key.pem")
    sys.stdout.flush()
