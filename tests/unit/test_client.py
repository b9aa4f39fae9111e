"""The coordinator client and the operator commands against an in-process fake coordinator.

The fake serves the real generated Admin/Router services on loopback with canned answers, so
address/token resolution, the wire calls, --json shapes and the one-line errors are checked
without daemons (the same commands run against real processes in tests/cluster/test_cli_*.py).
"""

from __future__ import annotations

import json
import re
from concurrent import futures
from pathlib import Path
from typing import Iterator

import grpc
import pytest
from click.testing import CliRunner

from shardsieve.cli.main import cli
from shardsieve.client import (
    DEFAULT_COORDINATOR, EXIT_AUTH, EXIT_INVALID, EXIT_USAGE, EXIT_NOT_FOUND, EXIT_UNAVAILABLE, EXIT_UNREACHABLE,
    ClientError, resolve_settings, translate_error,
)
from shardsieve import error_detail as ed
from shardsieve.testing.procs import free_port
from shardsieve.v1 import admin_pb2, admin_pb2_grpc, filter_pb2, routing_pb2, routing_pb2_grpc

TOKEN = "s3cret-token"


def _authorized(context: grpc.ServicerContext) -> bool:
    return ("authorization", f"Bearer {TOKEN}") in tuple(context.invocation_metadata())


def _node(i: int, **kw: object) -> admin_pb2.NodeStatus:
    base = dict(node_id=f"n{i}", address=f"127.0.0.1:{9000 + i}", connected=True, key_count=1000 * i,
                capacity=4000, fill=0.3, predicted_fpr=0.0081, observed_fpr=0.01, lookups_checked=100,
                state="fresh", geometry=filter_pb2.Geometry(bits=65536, hashes=4, scheme=1, seed=0),
                epoch=1, sequence=7 * i, wasted_probes=i)
    base.update(kw)
    return admin_pb2.NodeStatus(**base)  # type: ignore[arg-type]


class FakeAdmin(admin_pb2_grpc.AdminServicer):
    def __init__(self) -> None:
        self.policy = admin_pb2.Policy(target_fpr=0.01, saturation_ratio=2.0, growth=2.0, mode="safe")
        self.rebuilds: list[admin_pb2.RebuildCommand] = []

    def _guard(self, context: grpc.ServicerContext) -> None:
        if not _authorized(context):
            context.abort(grpc.StatusCode.UNAUTHENTICATED, "token missing or wrong")

    def FleetStatus(self, request, context):  # type: ignore[no-untyped-def]
        self._guard(context)
        return admin_pb2.FleetStatusReply(coordinator_id="fake", mode="safe", nodes=[
            _node(1), _node(2, saturated=True, saturation_reasons=["predicted FPR 0.05 > 2 x 0.01"]),
            _node(3, stale=True, state="stale"),
            _node(4, fill=0.97, implausible_fill=True),
        ], lookups=10, probes=12, avoided_fanout=0.6, wasted_probes=2)

    def NodeDetail(self, request, context):  # type: ignore[no-untyped-def]
        self._guard(context)
        if request.node_id != "n1":
            context.abort(grpc.StatusCode.NOT_FOUND, f"no node {request.node_id!r} is known")
        return admin_pb2.NodeDetailReply(status=_node(1), recent_decisions=[
            admin_pb2.Decision(at_unix=1.7e9, node_id="n1", action="flag", detail="fill 0.6")])

    def Rebuild(self, request, context):  # type: ignore[no-untyped-def]
        self._guard(context)
        self.rebuilds.append(request)
        return admin_pb2.RebuildReply(dry_run=request.dry_run, plan=[
            admin_pb2.PlannedRebuild(node_id=n, capacity=request.capacity or 2000, target_fpr=0.01,
                                     geometry=filter_pb2.Geometry(bits=32768, hashes=7), reason="operator")
            for n in request.node_ids])

    def GetPolicy(self, request, context):  # type: ignore[no-untyped-def]
        self._guard(context)
        return self.policy

    def SetPolicy(self, request, context):  # type: ignore[no-untyped-def]
        self._guard(context)
        for name, value in request.values.items():
            if name != "target_fpr":
                context.abort(grpc.StatusCode.INVALID_ARGUMENT, f"unknown policy name {name!r}")
            try:
                v = float(value)
            except ValueError:
                v = -1.0
            if not 0 < v < 1:
                context.abort(grpc.StatusCode.INVALID_ARGUMENT, f"policy target-fpr={value!r}: must be in (0, 1)")
            self.policy.target_fpr = v
        return self.policy


class FakeRouter(routing_pb2_grpc.RouterServicer):
    def __init__(self) -> None:
        self.store: dict[bytes, bytes] = {b"parcel/1": b"hello"}

    def Locate(self, request, context):  # type: ignore[no-untyped-def]
        if request.key in self.store:
            return routing_pb2.LocateReply(candidates=[routing_pb2.Candidate(node_id="n1", address="a:1")])
        return routing_pb2.LocateReply()

    def Read(self, request, context):  # type: ignore[no-untyped-def]
        if request.key == b"down":   # the detail names the node; the text says something else on purpose
            context.set_trailing_metadata(ed.trailing(ed.detail(ed.CANDIDATE_UNAVAILABLE, key=request.key, nodes=[
                ed.node_failure("n2", "127.0.0.1:9002", grpc.StatusCode.UNAVAILABLE, "connection refused")])))
            context.abort(grpc.StatusCode.UNAVAILABLE, "failed to connect to all addresses")
        if request.key in self.store:
            return routing_pb2.ReadReply(found=True, value=self.store[request.key], node_id="n1", probes=1,
                                         candidates=1)
        return routing_pb2.ReadReply(found=False, probes=0, candidates=0)

    def Write(self, request, context):  # type: ignore[no-untyped-def]
        created = request.key not in self.store
        self.store[request.key] = request.value
        return routing_pb2.WriteReply(node_id=request.node_id or "n2", created=created, epoch=1, sequence=9)

    def Remove(self, request, context):  # type: ignore[no-untyped-def]
        held = self.store.pop(request.key, None)
        return routing_pb2.RemoveReply(node_ids=["n2"] if held is not None else [])


@pytest.fixture(scope="module")
def fake() -> Iterator[tuple[str, FakeAdmin, FakeRouter]]:
    server = grpc.server(futures.ThreadPoolExecutor(max_workers=4))
    admin, router = FakeAdmin(), FakeRouter()
    admin_pb2_grpc.add_AdminServicer_to_server(admin, server)
    routing_pb2_grpc.add_RouterServicer_to_server(router, server)
    port = free_port()
    server.add_insecure_port(f"127.0.0.1:{port}")
    server.start()
    yield f"127.0.0.1:{port}", admin, router
    server.stop(None)


def run(args: list[str], env: dict[str, str] | None = None):  # type: ignore[no-untyped-def]
    runner = CliRunner()
    return runner.invoke(cli, args, env={"SHARDSIEVE_CONFIG": "", "SHARDSIEVE_COORDINATOR": None,
                                         "SHARDSIEVE_TOKEN": None, **(env or {})}, catch_exceptions=False)


def one_line_error(result) -> str:  # type: ignore[no-untyped-def]
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert len(lines) == 1, result.stderr
    assert lines[0].startswith("Error: ")
    assert "Traceback" not in result.output
    return lines[0]


# -- settings -----------------------------------------------------------------------------------
def test_address_resolution_order(tmp_path: Path) -> None:
    cfg = tmp_path / "c.toml"
    cfg.write_text('[cli]\ncoordinator = "10.0.0.1:7000"\ntoken = "from-file"\n')
    assert resolve_settings(environ={}).coordinator == DEFAULT_COORDINATOR
    assert resolve_settings(config_file=cfg, environ={}).coordinator == "10.0.0.1:7000"
    env = {"SHARDSIEVE_COORDINATOR": "10.0.0.2:7001", "SHARDSIEVE_CONFIG": str(cfg)}
    s = resolve_settings(environ=env)
    assert (s.coordinator, s.token) == ("10.0.0.2:7001", "from-file")
    s = resolve_settings(coordinator="10.0.0.3:7002", token="flag", environ={**env, "SHARDSIEVE_TOKEN": "env"})
    assert (s.coordinator, s.token) == ("10.0.0.3:7002", "flag")


def test_bad_settings_are_one_actionable_error(tmp_path: Path) -> None:
    cfg = tmp_path / "c.toml"
    cfg.write_text('[cli]\ncoordinater = "x:1"\n')
    with pytest.raises(ClientError, match="unknown setting 'coordinater'") as exc:
        resolve_settings(config_file=cfg, environ={})
    assert exc.value.exit_code == EXIT_INVALID
    with pytest.raises(ClientError, match="HOST:PORT"):
        resolve_settings(coordinator="nohost", environ={})


class _Err(grpc.RpcError):
    def __init__(self, code: grpc.StatusCode, details: str, detail: object = None) -> None:
        self._code, self._details, self._detail = code, details, detail

    def code(self) -> grpc.StatusCode:
        return self._code

    def details(self) -> str:
        return self._details

    def trailing_metadata(self) -> tuple[tuple[str, bytes], ...]:
        return ed.trailing(self._detail)  # type: ignore[arg-type]


NODE_DOWN = ed.detail(ed.CANDIDATE_UNAVAILABLE, key=b"k", nodes=[
    ed.node_failure("n2", "127.0.0.1:9002", grpc.StatusCode.UNAVAILABLE, "connection refused")])


# The exit code follows the structured detail, never the message text: the same text maps to 3
# without a detail (no coordinator decided anything) and to 7 with one naming the node.
@pytest.mark.parametrize("code,details,detail,exit_code,phrase", [
    (grpc.StatusCode.UNAVAILABLE, "failed to connect to all addresses", None, EXIT_UNREACHABLE, "cannot reach"),
    (grpc.StatusCode.UNAVAILABLE, "failed to connect to all addresses", NODE_DOWN, EXIT_UNAVAILABLE, "n2"),
    (grpc.StatusCode.UNAVAILABLE, "candidate n2 could not be asked", None, EXIT_UNREACHABLE, "cannot reach"),
    (grpc.StatusCode.UNAUTHENTICATED, "bad token", None, EXIT_AUTH, "--token"),
    (grpc.StatusCode.NOT_FOUND, "no node 'x'", None, EXIT_NOT_FOUND, "shardsieve status"),
    (grpc.StatusCode.INVALID_ARGUMENT, "growth must be > 1", None, EXIT_INVALID, "nothing was changed"),
])
def test_translate_error(code: grpc.StatusCode, details: str, detail: object, exit_code: int, phrase: str) -> None:
    err = translate_error(_Err(code, details + "\nsecond line", detail), "h:1", "Thing")
    assert err.exit_code == exit_code
    assert phrase in err.message
    assert "\n" not in err.message


# -- commands against the fake --------------------------------------------------------------------
def test_status_json_and_table(fake) -> None:  # type: ignore[no-untyped-def]
    addr, _, _ = fake
    res = run(["status", "--coordinator", addr, "--token", TOKEN, "--json"])
    assert res.exit_code == 0, res.output
    doc = json.loads(res.stdout)
    assert [n["node_id"] for n in doc["nodes"]] == ["n1", "n2", "n3", "n4"]
    assert doc["nodes"][1]["key_count"] == 2000 and isinstance(doc["nodes"][1]["key_count"], int)
    assert doc["nodes"][0]["geometry"]["scheme"] == "HASH_SCHEME_MMH3_KM_V1"
    res = run(["status"], env={"SHARDSIEVE_COORDINATOR": addr, "SHARDSIEVE_TOKEN": TOKEN})
    assert res.exit_code == 0
    assert "SATURATED" in res.stdout and "stale" in res.stdout
    assert "rebuild --flagged" in res.stdout


def test_status_marks_implausible_fill(fake) -> None:  # type: ignore[no-untyped-def]
    """A node the coordinator flags `implausible_fill` stands out in the table and keeps the flag in --json."""
    addr, _, _ = fake
    common = ["--coordinator", addr, "--token", TOKEN]
    doc = json.loads(run(["status", "--json", *common]).stdout)
    assert {n["node_id"]: n["implausible_fill"] for n in doc["nodes"]} == {
        "n1": False, "n2": False, "n3": False, "n4": True}
    res = run(["status", *common])
    assert res.exit_code == 0, res.output
    rows = {line.split()[1]: line for line in res.stdout.splitlines() if line.startswith("│ n")}
    assert "IMPLAUSIBLE-FILL" in rows["n4"]
    assert all("IMPLAUSIBLE" not in rows[n] for n in ("n1", "n2", "n3"))
    assert "implausible fill: n4" in res.stdout
    # coloured like saturated/stale rows: rich's FORCE_COLOR makes the styles visible as ANSI codes
    res = run(["status", *common], env={"FORCE_COLOR": "1", "COLUMNS": "200"})
    coloured = {m.group(1): line for line in res.stdout.splitlines() if (m := re.search(r"m(n\d) ", line))
                or (m := re.match(r"│ (n\d) ", line))}
    magenta = "\x1b[1;35m"       # SGR bold (1) + magenta foreground (35), ECMA-48 section 8.3.117
    assert magenta in coloured["n4"]
    assert all(magenta not in coloured[n] for n in ("n1", "n2", "n3"))


def test_wrong_token_exits_4_with_one_line(fake) -> None:  # type: ignore[no-untyped-def]
    addr, _, _ = fake
    res = run(["status", "--coordinator", addr, "--token", "nope"])
    assert res.exit_code == EXIT_AUTH
    assert "--token" in one_line_error(res)


def test_unreachable_coordinator_exits_3(fake) -> None:  # type: ignore[no-untyped-def]
    res = run(["status", "--coordinator", f"127.0.0.1:{free_port()}", "--timeout", "1"])
    assert res.exit_code == EXIT_UNREACHABLE
    assert "cannot reach the coordinator" in one_line_error(res)


def test_inspect_known_and_unknown_node(fake) -> None:  # type: ignore[no-untyped-def]
    addr, _, _ = fake
    res = run(["inspect", "n1", "--coordinator", addr, "--token", TOKEN, "--json"])
    assert res.exit_code == 0
    doc = json.loads(res.stdout)
    assert doc["status"]["node_id"] == "n1" and doc["recent_decisions"][0]["action"] == "flag"
    res = run(["inspect", "ghost", "--coordinator", addr, "--token", TOKEN])
    assert res.exit_code == EXIT_NOT_FOUND
    assert "ghost" in one_line_error(res)


def test_rebuild_sends_the_options(fake) -> None:  # type: ignore[no-untyped-def]
    addr, admin, _ = fake
    res = run(["rebuild", "n1", "n2", "--capacity", "5000", "--fpr", "0.001", "--dry-run", "--json",
               "--coordinator", addr, "--token", TOKEN])
    assert res.exit_code == 0, res.output
    sent = admin.rebuilds[-1]
    assert (list(sent.node_ids), sent.capacity, sent.target_fpr, sent.dry_run) == (["n1", "n2"], 5000, 0.001, True)
    doc = json.loads(res.stdout)
    assert doc["dry_run"] is True and [p["node_id"] for p in doc["plan"]] == ["n1", "n2"]
    res = run(["rebuild", "n1", "--fpr", "1.5", "--coordinator", addr])
    assert res.exit_code == 2
    assert "--fpr" in one_line_error(res)


def test_get_put_delete_locate_round_trip(fake) -> None:  # type: ignore[no-untyped-def]
    addr, _, router = fake
    common = ["--coordinator", addr]
    res = run(["put", "crate/7", "oak", "--node", "n5", "--json", *common])
    assert res.exit_code == 0
    assert json.loads(res.stdout)["node_id"] == "n5" and router.store[b"crate/7"] == b"oak"
    res = run(["get", "crate/7", *common])
    assert (res.exit_code, res.stdout.strip()) == (0, "oak")
    res = run(["locate", "crate/7", "--json", *common])
    assert json.loads(res.stdout)["candidates"][0]["node_id"] == "n1"
    res = run(["delete", "crate/7", "--json", *common])
    assert json.loads(res.stdout) == {"key": "crate/7", "deleted": True, "node_ids": ["n2"]}
    res = run(["get", "crate/7", *common])
    assert res.exit_code == EXIT_NOT_FOUND
    assert "on no node" in one_line_error(res)
    res = run(["get", "down", *common])
    assert res.exit_code == EXIT_UNAVAILABLE
    assert "n2" in one_line_error(res) and "could not be asked" in one_line_error(res)
    res = run(["get", "zz", "--hex", *common])
    assert res.exit_code == EXIT_INVALID


def test_policy_show_and_set(fake) -> None:  # type: ignore[no-untyped-def]
    addr, admin, _ = fake
    common = ["--coordinator", addr, "--token", TOKEN]
    res = run(["policy", "set", "target-fpr=0.02", "--json", *common])
    assert res.exit_code == 0, res.output
    assert json.loads(res.stdout)["target_fpr"] == pytest.approx(0.02)
    res = run(["policy", "show", "--json", *common])
    assert json.loads(res.stdout)["target_fpr"] == pytest.approx(0.02)
    res = run(["policy", "set", "target_fpr=7", *common])
    assert res.exit_code == EXIT_INVALID
    assert "nothing was changed" in one_line_error(res)
    assert admin.policy.target_fpr == pytest.approx(0.02)
    res = run(["policy", "set", "target_fpr", *common])   # no '=': a malformed command line (docs/cli.md)
    assert res.exit_code == EXIT_USAGE
    assert "NAME=VALUE" in one_line_error(res)
    assert admin.policy.target_fpr == pytest.approx(0.02)


# -- command-line rails ----------------------------------------------------------------------------
def test_a_key_typed_in_a_non_utf8_locale_keeps_its_bytes(fake) -> None:  # type: ignore[no-untyped-def]
    """Python keeps undecodable argv bytes as lone surrogates (PEP 383); KEY and VALUE are sent as
    the very bytes typed, never a crash."""
    addr, _, router = fake
    key, value = "crate/\udcff\udcfe", "\udce9t\udce9"          # the bytes ff fe and e9 74 e9 (Latin-1 'été')
    res = run(["put", key, value, "--json", "--coordinator", addr])
    assert res.exit_code == 0, res.output
    assert router.store[b"crate/\xff\xfe"] == b"\xe9t\xe9"
    res = run(["get", key, "--hex", "--coordinator", addr])   # --hex: the key is hex, so this is bad hex
    assert res.exit_code == EXIT_INVALID
    res = run(["get", "63726174652fFFFE", "--hex", "--coordinator", addr])
    assert (res.exit_code, res.stdout.strip()) == (0, "e974e9")


@pytest.mark.parametrize("args, named", [
    (["put", "k", "v", "--node", "n\udcff"], "--node"),
    (["inspect", "n\udcff"], "NODE"),
    (["rebuild", "n\udcff", "--dry-run"], "NODES"),
    (["policy", "set", "mode=f\udcffst"], "ASSIGNMENTS"),
])
def test_text_arguments_that_are_not_utf8_are_refused_by_name(fake, args: list[str], named: str) -> None:  # type: ignore[no-untyped-def]
    addr, admin, router = fake
    before = (len(admin.rebuilds), dict(router.store), admin.policy.mode)
    res = run([*args, "--coordinator", addr, "--token", TOKEN])
    assert res.exit_code == EXIT_USAGE
    line = one_line_error(res)
    assert named in line and "UTF-8" in line
    assert (len(admin.rebuilds), dict(router.store), admin.policy.mode) == before   # nothing sent


def test_out_of_range_capacity_is_a_usage_error_not_a_crash(fake) -> None:  # type: ignore[no-untyped-def]
    addr, admin, _ = fake
    sent = len(admin.rebuilds)
    res = run(["rebuild", "n1", "--capacity", "99999999999999999999", "--dry-run", "--coordinator", addr,
               "--token", TOKEN])
    assert res.exit_code == EXIT_USAGE
    line = one_line_error(res)
    assert "--capacity" in line and "unexpected" not in line
    assert len(admin.rebuilds) == sent


def test_status_table_words_and_one_rate_format(fake) -> None:  # type: ignore[no-untyped-def]
    addr, _, _ = fake
    res = run(["status", "--coordinator", addr, "--token", TOKEN], env={"COLUMNS": "220"})
    assert res.exit_code == 0, res.output
    title = next(line for line in res.stdout.splitlines() if "mode" in line)
    assert "coordinator coordinator" not in title and "fake" in title and "4 nodes" in title
    rows = [line for line in res.stdout.splitlines() if line.startswith("│ n")]
    for row in rows:   # every rate cell in the same scientific format (predicted 0.0081, observed 0.01)
        cells = [c.strip() for c in row.split("│")]
        assert re.fullmatch(r"\d\.\d\de[-+]\d\d", cells[6]), cells
        assert re.fullmatch(r"\d\.\d\de[-+]\d\d", cells[7]), cells


def test_help_of_single_key_commands_mentions_no_value() -> None:
    for command in ("get", "locate", "delete"):
        text = run([command, "--help"]).stdout
        assert "VALUE" not in text, command
    assert "KEY and VALUE" in run(["put", "--help"]).stdout


def test_inspect_labels_the_nodes_own_miss_count(fake) -> None:  # type: ignore[no-untyped-def]
    addr, _, _ = fake
    res = run(["inspect", "n1", "--coordinator", addr, "--token", TOKEN])
    assert res.exit_code == 0
    assert "misses the node counted" not in res.stdout
    assert "reads the node answered not-found" in res.stdout


@pytest.mark.parametrize("args", [
    ["inspect", "n\u043ede-1"],                  # Cyrillic small letter o (U+043E): a look-alike of node-1
    ["inspect", ".."],
    ["rebuild", "n1", "n2/../n3"],
    ["unlist", "kelp\x1bshed", "--yes"],
    ["put", "crate-7", "oak", "--node", "Node-1"],
])
def test_node_ids_outside_the_alphabet_exit_6_before_any_call(args: list[str]) -> None:
    # docs/cli.md, exit codes; docs/node.md, "Node ids". The coordinator address answers nothing:
    # a call would end in exit 3, so exit 6 shows the id was refused locally first.
    res = run([*args, "--coordinator", f"127.0.0.1:{free_port()}", "--timeout", "1"])
    assert res.exit_code == EXIT_INVALID, res.output
    assert "a node id is 1 to 64 characters" in one_line_error(res)
