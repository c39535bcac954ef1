"""Key delivery to SAEs (ETSI GS QKD 014): the public names of this part of the SDK.

    from keystrata_client.keys import KeyClient

    with KeyClient("https://station-a.example:8443", identity) as kme:
        container = kme.get_keys("sae-b1", number=2, size=256)
        print(container.key_ids)          # pass these to the partner SAE

See ``keystrata_client._keys`` for the checks made on answers and the retry rules.
"""

from keystrata_client._keys import (
    BASE_PATH,
    MAX_BACKOFF,
    AsyncKeyClient,
    Key,
    KeyClient,
    KeyContainer,
    KeyStatus,
    RequestForm,
    UncertainDeliveryError,
    is_key_id,
)

__all__ = [
    "BASE_PATH",
    "MAX_BACKOFF",
    "AsyncKeyClient",
    "Key",
    "KeyClient",
    "KeyContainer",
    "KeyStatus",
    "RequestForm",
    "UncertainDeliveryError",
    "is_key_id",
]
