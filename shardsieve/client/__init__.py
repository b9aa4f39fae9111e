"""shardsieve's client library: read and write through coordinators, or route locally.

    from shardsieve.client import Client

    with Client(["10.0.0.5:7400", "10.0.0.6:7400"], token=READ_WRITE_TOKEN) as client:
        client.put(b"parcel/7", b"kelp line 3")
        result = client.get(b"parcel/7")          # ReadResult(found=True, value=..., node_id=...)

`Client` (threads) and `AsyncClient` (asyncio) have the same calls: get, get_many, put,
put_many, delete, delete_many, locate, locate_many, each with a per-call deadline. Failover
between coordinators and retries: shardsieve/client/policy.py. Exceptions: errors.py.
Results: results.py. Local routing (a replica in process, nodes probed directly):
replica.py. The guide with the failure semantics is docs/client.md.

The operator tools' settings and one-line failures (the CLI) are in settings.py.
"""

from shardsieve.client.errors import (
    AuthFailed,
    CandidateUnavailable,
    CoordinatorUnavailable,
    InvalidInput,
    LimitExceeded,
    MoveUnfinished,
    NodeFailure,
    NodeUnavailable,
    NoNodeAvailable,
    NotFound,
    Overloaded,
    Refused,
    SecondCopy,
    ShardsieveError,
    Unavailable,
    UnknownNode,
)
from shardsieve.client.policy import CoordinatorPool, RetryPolicy
from shardsieve.client.replica import LocalReplica
from shardsieve.client.results import Candidate, DeleteResult, ReadResult, WriteResult
from shardsieve.client.sync_client import Client
from shardsieve.client.aio_client import AsyncClient
from shardsieve.client.settings import (
    CONFIG_ENV,
    DEFAULT_COORDINATOR,
    EXIT_AUTH,
    EXIT_FAILURE,
    EXIT_INVALID,
    EXIT_NOT_FOUND,
    EXIT_UNAVAILABLE,
    EXIT_UNREACHABLE,
    EXIT_USAGE,
    CliSettings,
    ClientError,
    OperatorClient,
    connect,
    default_config_path,
    resolve_settings,
    settings_summary,
    translate,
    translate_error,
)

__all__ = [
    "AsyncClient", "AuthFailed", "Candidate", "CandidateUnavailable", "Client", "CoordinatorPool",
    "CoordinatorUnavailable", "DeleteResult", "InvalidInput", "LimitExceeded", "LocalReplica", "MoveUnfinished",
    "NoNodeAvailable", "NodeFailure", "NodeUnavailable", "NotFound", "Overloaded", "ReadResult", "Refused",
    "RetryPolicy", "SecondCopy", "ShardsieveError", "Unavailable", "UnknownNode", "WriteResult",
    "CONFIG_ENV", "DEFAULT_COORDINATOR", "EXIT_AUTH", "EXIT_FAILURE", "EXIT_INVALID", "EXIT_NOT_FOUND",
    "EXIT_UNAVAILABLE", "EXIT_UNREACHABLE", "EXIT_USAGE", "CliSettings", "ClientError", "OperatorClient", "connect",
    "default_config_path", "resolve_settings", "settings_summary", "translate", "translate_error",
]
