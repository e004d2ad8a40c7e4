"""Object store credentials as a Prefect Block, and the options any credentials Block gives a file system.

A source names its credentials as ``block-type/name`` (``sources.<name>.credentials``):
``fitaudit-store-credentials/<name>`` is :class:`ObjectStoreCredentials` (fitaudit's own, no
extra package); ``aws-credentials/<name>`` is prefect-aws's ``AwsCredentials`` when that package
is installed.  Either becomes the same s3fs-style options (``key``, ``secret``, ``token``,
``region``, ``endpoint_url``) through :func:`block_options`.  Secret fields are
:class:`pydantic.SecretStr`: Prefect masks them in its UI and logs; fitaudit reads them only to
open the file system and never writes them anywhere.
"""

from __future__ import annotations

from typing import Any

from prefect.blocks.core import Block
from pydantic import Field, SecretStr

__all__ = ["ObjectStoreCredentials", "block_options"]


class ObjectStoreCredentials(Block):
    """Credentials and endpoint of an S3-compatible object store, for the sources that name this Block.

    Save one with ``ObjectStoreCredentials(access_key_id=..., secret_access_key=...).save("warehouse")``
    and name it in the registry as ``credentials: fitaudit-store-credentials/warehouse``.
    """

    _block_type_name = "fitaudit store credentials"
    _block_type_slug = "fitaudit-store-credentials"
    _description = "Access key, secret and endpoint of an S3-compatible object store holding fitaudit extracts."

    access_key_id: str | None = Field(None, description="The access key id.")
    secret_access_key: SecretStr | None = Field(None, description="The secret access key.")
    session_token: SecretStr | None = Field(None, description="A session token (temporary credentials).")
    region: str | None = Field(None, description="The region, e.g. eu-west-1.")
    endpoint_url: str | None = Field(
        None, description="The endpoint of a store other than AWS S3, e.g. https://s3.example.net."
    )

    def store_options(self) -> dict[str, str]:
        """The s3fs-style options these credentials give (secrets in clear: for the file system only)."""
        values = {
            "key": self.access_key_id,
            "secret": _reveal(self.secret_access_key),
            "token": _reveal(self.session_token),
            "region": self.region,
            "endpoint_url": self.endpoint_url,
        }
        return {k: v for k, v in values.items() if v}


def _reveal(value: Any) -> Any:
    return value.get_secret_value() if hasattr(value, "get_secret_value") else value


def block_options(block: Any) -> dict[str, Any]:
    """The s3fs-style options of a loaded credentials Block (fitaudit's, or prefect-aws's ``AwsCredentials``)."""
    if hasattr(block, "store_options"):
        return block.store_options()
    values = {
        "key": getattr(block, "aws_access_key_id", None),
        "secret": _reveal(getattr(block, "aws_secret_access_key", None)),
        "token": _reveal(getattr(block, "aws_session_token", None)),
        "region": getattr(block, "region_name", None),
        "endpoint_url": getattr(getattr(block, "aws_client_parameters", None), "endpoint_url", None),
    }
    return {k: v for k, v in values.items() if v}
