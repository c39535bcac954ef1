"""keystrata_client: talk to keystrata nodes from other hosts.

Clients for the operator/auditor API (registry, pool levels) and for QKD modules that
push link key blocks, over HTTPS with mutual TLS::

    from pathlib import Path
    from keystrata_client import OperatorClient, TlsIdentity

    me = TlsIdentity(ca=Path("ca.pem"), cert=Path("op.pem"), key=Path("op.key"))
    with OperatorClient("https://relay.example:8443", me) as node:
        print(node.pools())

This package never imports the server package ``keystrata``.
"""

from keystrata_client._blocks import (
    BINARY_MEDIA_TYPE,
    RECORD_VERSION,
    LinkBlock,
    encode_binary,
    to_json,
)
from keystrata_client._errors import (
    ApiError,
    ConnectionProblem,
    KeystrataClientError,
    TransportError,
)
from keystrata_client._module import AsyncModuleClient, IngestResult, ModuleClient
from keystrata_client._operator import REGISTRY_KINDS, OperatorClient, RegistryKind
from keystrata_client._tls import TlsIdentity
from keystrata_client.keys import (
    AsyncKeyClient,
    Key,
    KeyClient,
    KeyContainer,
    KeyStatus,
    UncertainDeliveryError,
)

__version__ = "0.1.0"

__all__ = [
    "BINARY_MEDIA_TYPE",
    "RECORD_VERSION",
    "REGISTRY_KINDS",
    "ApiError",
    "AsyncKeyClient",
    "AsyncModuleClient",
    "ConnectionProblem",
    "IngestResult",
    "Key",
    "KeyClient",
    "KeyContainer",
    "KeyStatus",
    "KeystrataClientError",
    "LinkBlock",
    "ModuleClient",
    "OperatorClient",
    "RegistryKind",
    "TlsIdentity",
    "TransportError",
    "UncertainDeliveryError",
    "__version__",
    "encode_binary",
    "to_json",
]
