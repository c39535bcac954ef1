"""Key delivery to SAEs (ETSI GS QKD 014): the public names of this part of the SDK.

    from keystrata_client.keys import KeyClient

    with KeyClient("https://station-a.example:8443", identity) as kme:
        container = kme.get_keys("sae-b1", number=2, size=256)
        print(container.key_ids)          # pass these to the partner SAE

See ``keystrata_client._keys`` for the retry rules and ``keystrata_client._key_answers``
for the checks made on answers.
"""

from keystrata_client._async_key_client import AsyncKeyClient
from keystrata_client._key_answers import Key, KeyContainer, KeyStatus, is_key_id
from keystrata_client._key_client import KeyClient
from keystrata_client._keys import BASE_PATH, MAX_BACKOFF, RequestForm, UncertainDeliveryError

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
