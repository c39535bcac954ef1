"""SQLAlchemy models of one node's database.

Migrations in ``migrations/versions`` are the source of the schema in production; a test
compares them with these models and fails on any drift.
"""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Any

from sqlalchemy import (
    JSON,
    BigInteger,
    CheckConstraint,
    DateTime,
    Float,
    ForeignKey,
    Index,
    Integer,
    LargeBinary,
    MetaData,
    String,
    Text,
    UniqueConstraint,
    text,
)
from sqlalchemy.engine import Dialect
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column
from sqlalchemy.types import TypeDecorator

NAMING = {
    "ix": "ix_%(column_0_label)s",
    "uq": "uq_%(table_name)s_%(column_0_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}

ID_LEN = 64


class UTCDateTime(TypeDecorator[datetime]):
    """A timestamp that is always timezone-aware UTC in Python, whatever the backend."""

    impl = DateTime(timezone=True)
    cache_ok = True

    def process_bind_param(self, value: datetime | None, dialect: Dialect) -> datetime | None:
        if value is None:
            return None
        if value.tzinfo is None:
            raise ValueError("naive datetimes are not stored; pass a UTC-aware value")
        value = value.astimezone(UTC)
        return value.replace(tzinfo=None) if dialect.name == "sqlite" else value

    def process_result_value(self, value: datetime | None, dialect: Dialect) -> datetime | None:
        if value is None:
            return None
        return value.replace(tzinfo=UTC) if value.tzinfo is None else value.astimezone(UTC)


class Base(DeclarativeBase):
    metadata = MetaData(naming_convention=NAMING)
    type_annotation_map: dict[Any, Any] = {datetime: UTCDateTime}


class _Lifecycle:
    created_at: Mapped[datetime]
    updated_at: Mapped[datetime]
    retired_at: Mapped[datetime | None] = mapped_column(
        comment="set when retired; retired rows stay for the record and are never reused"
    )


class NodeMeta(Base):
    """Small named values of this node (sealed secrets, check values)."""

    __tablename__ = "node_meta"
    name: Mapped[str] = mapped_column(String(64), primary_key=True)
    value: Mapped[bytes] = mapped_column(LargeBinary)


class RegistryNode(_Lifecycle, Base):
    __tablename__ = "registry_node"
    __table_args__ = (CheckConstraint("role IN ('relay', 'station')", name="role"),)
    node_id: Mapped[str] = mapped_column(String(ID_LEN), primary_key=True)
    role: Mapped[str] = mapped_column(String(16))
    url: Mapped[str | None] = mapped_column(String(255), comment="base HTTPS URL of the node")
    description: Mapped[str] = mapped_column(Text, default="")
    physical: Mapped[dict[str, Any] | None] = mapped_column(
        JSON(none_as_null=True),
        comment="JSON: platform (relay) or station position and sky, for the link model",
    )


class QkdLink(_Lifecycle, Base):
    __tablename__ = "qkd_link"
    __table_args__ = (CheckConstraint("relay_id <> station_id", name="distinct_ends"),)
    link_id: Mapped[str] = mapped_column(String(ID_LEN), primary_key=True)
    relay_id: Mapped[str] = mapped_column(ForeignKey("registry_node.node_id"))
    station_id: Mapped[str] = mapped_column(ForeignKey("registry_node.node_id"))
    description: Mapped[str] = mapped_column(Text, default="")
    optics: Mapped[dict[str, Any] | None] = mapped_column(
        JSON(none_as_null=True),
        comment="JSON: transmitter, receiver and protocol of the link, for the link model",
    )


class Pair(_Lifecycle, Base):
    """Two stations provisioned to share end-to-end key through a relay, with a policy."""

    __tablename__ = "pair"
    __table_args__ = (
        CheckConstraint("station_a < station_b", name="ordered_stations"),
        CheckConstraint(
            "min_key_size >= 8 AND min_key_size % 8 = 0 AND max_key_size % 8 = 0 "
            "AND default_key_size % 8 = 0 AND min_key_size <= default_key_size "
            "AND default_key_size <= max_key_size",
            name="key_sizes",
        ),
        CheckConstraint(
            "buffer_min_bits >= 0 AND buffer_min_bits <= buffer_target_bits "
            "AND buffer_target_bits <= buffer_max_bits",
            name="buffer",
        ),
        CheckConstraint("priority BETWEEN 1 AND 1000", name="priority"),
        CheckConstraint("daily_quota_bits IS NULL OR daily_quota_bits > 0", name="quota"),
        CheckConstraint(
            "sae_daily_quota_bits IS NULL OR sae_daily_quota_bits > 0", name="sae_quota"
        ),
        CheckConstraint("key_ttl_seconds > 0", name="ttl"),
        CheckConstraint("max_epsilon IS NULL OR max_epsilon > 0", name="epsilon"),
    )
    pair_id: Mapped[str] = mapped_column(String(ID_LEN), primary_key=True)
    relay_id: Mapped[str] = mapped_column(ForeignKey("registry_node.node_id"))
    station_a: Mapped[str] = mapped_column(ForeignKey("registry_node.node_id"))
    station_b: Mapped[str] = mapped_column(ForeignKey("registry_node.node_id"))
    min_key_size: Mapped[int] = mapped_column(Integer, comment="bits")
    max_key_size: Mapped[int] = mapped_column(Integer, comment="bits")
    default_key_size: Mapped[int] = mapped_column(Integer, comment="bits")
    buffer_min_bits: Mapped[int] = mapped_column(BigInteger)
    buffer_target_bits: Mapped[int] = mapped_column(BigInteger)
    buffer_max_bits: Mapped[int] = mapped_column(BigInteger)
    daily_quota_bits: Mapped[int | None] = mapped_column(
        BigInteger, comment="bits of key each station may hand out per UTC day; NULL: no quota"
    )
    priority: Mapped[int] = mapped_column(Integer, comment="weight in max-min fair sharing")
    max_epsilon: Mapped[float | None] = mapped_column(
        Float, comment="segments whose composed security parameter exceeds this are not made"
    )
    key_ttl_seconds: Mapped[int] = mapped_column(Integer)
    masters: Mapped[list[str] | None] = mapped_column(
        JSON(none_as_null=True),
        comment="SAE IDs that may be master in this pair; NULL: any SAE of its stations",
    )
    slaves: Mapped[list[str] | None] = mapped_column(
        JSON(none_as_null=True),
        comment="SAE IDs that may be slave in this pair; NULL: any SAE of its stations",
    )
    sae_daily_quota_bits: Mapped[int | None] = mapped_column(
        BigInteger, comment="bits one master SAE may take per UTC day; NULL: no such quota"
    )


class Principal(_Lifecycle, Base):
    """A caller identified by its client certificate: its role and what it is bound to."""

    __tablename__ = "principal"
    __table_args__ = (
        CheckConstraint(
            "role IN ('sae', 'operator', 'auditor', 'peer', 'qkd-module', 'monitor')", name="role"
        ),
        CheckConstraint("(role = 'sae') = (station_id IS NOT NULL)", name="sae_station"),
        CheckConstraint("(role = 'qkd-module') = (link_id IS NOT NULL)", name="module_link"),
        CheckConstraint("(role = 'peer') = (node_id IS NOT NULL)", name="peer_node"),
        Index(
            "uq_principal_active_subject",
            "cert_subject",
            unique=True,
            sqlite_where=text("retired_at IS NULL"),
            postgresql_where=text("retired_at IS NULL"),
        ),
    )
    principal_id: Mapped[str] = mapped_column(String(ID_LEN), primary_key=True)
    role: Mapped[str] = mapped_column(String(16))
    cert_subject: Mapped[str] = mapped_column(
        String(255), comment="subject common name of the client certificate"
    )
    cert_sha256: Mapped[str | None] = mapped_column(
        String(64), comment="optional pin: hex SHA-256 of the certificate (DER)"
    )
    station_id: Mapped[str | None] = mapped_column(ForeignKey("registry_node.node_id"))
    link_id: Mapped[str | None] = mapped_column(ForeignKey("qkd_link.link_id"))
    node_id: Mapped[str | None] = mapped_column(ForeignKey("registry_node.node_id"))
    description: Mapped[str] = mapped_column(Text, default="")


class LinkBlock(Base):
    """A block of link key from a QKD module; bytes [used:length] are still sealed."""

    __tablename__ = "link_block"
    __table_args__ = (
        UniqueConstraint("link_id", "block_id", name="uq_link_block_link_block"),
        CheckConstraint("used >= 0 AND used <= length", name="used"),
        CheckConstraint("(used = length) = (sealed IS NULL)", name="sealed_iff_left"),
        CheckConstraint("qber >= 0 AND qber <= 0.5", name="qber"),
        CheckConstraint("epsilon >= 0 AND epsilon < 1", name="epsilon"),
        Index(
            "ix_link_block_available",
            "link_id",
            "seq",
            sqlite_where=text("used < length"),
            postgresql_where=text("used < length"),
        ),
        Index("ix_link_block_received", "link_id", "received_at"),
    )
    seq: Mapped[int] = mapped_column(
        BigInteger().with_variant(Integer, "sqlite"), primary_key=True, autoincrement=True
    )
    link_id: Mapped[str] = mapped_column(ForeignKey("qkd_link.link_id"))
    block_id: Mapped[str] = mapped_column(String(36), comment="UUID given by the QKD module")
    length: Mapped[int] = mapped_column(Integer, comment="bytes as received")
    used: Mapped[int] = mapped_column(Integer, default=0, comment="bytes consumed, from the front")
    qber: Mapped[float] = mapped_column(Float)
    epsilon: Mapped[float] = mapped_column(Float)
    produced_at: Mapped[datetime]
    received_at: Mapped[datetime]
    fingerprint: Mapped[bytes] = mapped_column(
        LargeBinary(32), comment="HMAC of the bytes under a sealed node secret; spots re-sends"
    )
    sealed: Mapped[bytes | None] = mapped_column(
        LargeBinary, comment="bytes [used:length], sealed under the KEK; NULL once all used"
    )


class LedgerHead(Base):
    """Single row serialising ledger appends; holds the number of entries."""

    __tablename__ = "ledger_head"
    __table_args__ = (CheckConstraint("id = 1", name="single_row"),)
    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    size: Mapped[int] = mapped_column(BigInteger)
    frontier: Mapped[bytes | None] = mapped_column(
        LargeBinary, comment="hashes of the perfect subtrees decomposing [0, size)"
    )


class LedgerNode(Base):
    """A perfect subtree of the ledger's Merkle tree (RFC 9162): the hash of leaves
    [index * 2**level, (index + 1) * 2**level). Written with the entry completing it."""

    __tablename__ = "ledger_node"
    level: Mapped[int] = mapped_column(Integer, primary_key=True, autoincrement=False)
    idx: Mapped[int] = mapped_column(BigInteger, primary_key=True, autoincrement=False)
    hash: Mapped[bytes] = mapped_column(LargeBinary(32))


class LedgerCheckpoint(Base):
    """A signed tree head: ``<origin>\n<tree size>\n<base64 root hash>\n`` (the body of
    a C2SP tlog checkpoint) signed with the node's Ed25519 ledger key."""

    __tablename__ = "ledger_checkpoint"
    tree_size: Mapped[int] = mapped_column(BigInteger, primary_key=True, autoincrement=False)
    root_hash: Mapped[bytes] = mapped_column(LargeBinary(32))
    signed_text: Mapped[str] = mapped_column(Text)
    signature: Mapped[bytes] = mapped_column(LargeBinary(64))
    signed_at: Mapped[datetime]


class LedgerEntry(Base):
    """An audit entry: RFC 8785 canonical JSON, written in the transaction it records."""

    __tablename__ = "ledger_entry"
    __table_args__ = (Index("ix_ledger_entry_event", "event", "idx"),)
    idx: Mapped[int] = mapped_column(BigInteger, primary_key=True, autoincrement=False)
    recorded_at: Mapped[datetime] = mapped_column(index=True)
    event: Mapped[str] = mapped_column(String(64))
    entry: Mapped[bytes] = mapped_column(LargeBinary, comment="canonical JSON bytes (RFC 8785)")


class LedgerRef(Base):
    """What an entry names (pair, SAE, key ID, node, segment), so auditors can search
    without decoding every entry. Written with the entry; derived, never key material."""

    __tablename__ = "ledger_ref"
    kind: Mapped[str] = mapped_column(String(8), primary_key=True)
    value: Mapped[str] = mapped_column(String(128), primary_key=True)
    idx: Mapped[int] = mapped_column(BigInteger, primary_key=True, autoincrement=False)


class RelayOp(Base):
    """A relay operation (at the relay): which link bytes made which segment. The key
    bytes themselves were destroyed in the transaction that wrote this row."""

    __tablename__ = "relay_op"
    __table_args__ = (
        CheckConstraint("state IN ('sent', 'ready', 'discarded')", name="state"),
        CheckConstraint("notice_station <> cipher_station", name="two_stations"),
        Index("ix_relay_op_pair_state", "pair_id", "state"),
    )
    segment_id: Mapped[str] = mapped_column(String(36), primary_key=True)
    pair_id: Mapped[str] = mapped_column(ForeignKey("pair.pair_id"))
    notice_station: Mapped[str] = mapped_column(
        String(ID_LEN), comment="station A: told which of its link bytes form the segment"
    )
    cipher_station: Mapped[str] = mapped_column(
        String(ID_LEN), comment="station B: sent the ciphertext KA xor KB and its tag"
    )
    owner: Mapped[str] = mapped_column(String(ID_LEN))
    length: Mapped[int] = mapped_column(Integer, comment="bytes of pair key")
    epsilon: Mapped[float] = mapped_column(Float)
    ranges: Mapped[str] = mapped_column(Text, comment="JSON: link bytes used, per link")
    state: Mapped[str] = mapped_column(String(16))
    made_at: Mapped[datetime]
    settled_at: Mapped[datetime | None]


class PairSegment(Base):
    """A segment of pair key at a station; bytes [used:length] are still sealed."""

    __tablename__ = "pair_segment"
    __table_args__ = (
        CheckConstraint("state IN ('pending', 'ready', 'discarded')", name="state"),
        CheckConstraint("used >= 0 AND used <= length", name="used"),
        CheckConstraint(
            "(sealed IS NULL) = (state = 'discarded' OR used = length)", name="sealed_iff_live"
        ),
        CheckConstraint("side IN ('notice', 'cipher')", name="side"),
        Index("ix_pair_segment_pair_state", "pair_id", "state", "owner"),
    )
    segment_id: Mapped[str] = mapped_column(String(36), primary_key=True)
    pair_id: Mapped[str] = mapped_column(ForeignKey("pair.pair_id"))
    side: Mapped[str] = mapped_column(
        String(8), comment="notice: this station decides ready/discarded; cipher: it follows"
    )
    partner: Mapped[str] = mapped_column(String(ID_LEN), comment="the other station")
    owner: Mapped[str] = mapped_column(String(ID_LEN), comment="station that serves it as master")
    length: Mapped[int] = mapped_column(Integer, comment="bytes of pair key")
    used: Mapped[int] = mapped_column(Integer, default=0)
    epsilon: Mapped[float] = mapped_column(Float)
    state: Mapped[str] = mapped_column(String(16))
    reason: Mapped[str | None] = mapped_column(String(64), comment="why it was discarded")
    link_applied: Mapped[bool] = mapped_column(
        comment="the relay's message naming this station's link bytes has been applied"
    )
    made_at: Mapped[datetime] = mapped_column(comment="when the relay made it")
    received_at: Mapped[datetime]
    settled_at: Mapped[datetime | None]
    sealed: Mapped[bytes | None] = mapped_column(LargeBinary)


class OutboxMessage(Base):
    """A message to a peer node, written in the transaction that decided to send it."""

    __tablename__ = "outbox"
    __table_args__ = (Index("ix_outbox_due", "due_at"),)
    id: Mapped[int] = mapped_column(
        BigInteger().with_variant(Integer, "sqlite"), primary_key=True, autoincrement=True
    )
    destination: Mapped[str] = mapped_column(String(ID_LEN))
    kind: Mapped[str] = mapped_column(String(32))
    segment_id: Mapped[str | None] = mapped_column(String(36))
    body: Mapped[bytes] = mapped_column(LargeBinary, comment="JSON; never holds key material")
    attempts: Mapped[int] = mapped_column(Integer, default=0)
    due_at: Mapped[datetime]
    claimed_until: Mapped[datetime | None]
    last_error: Mapped[str | None] = mapped_column(String(255))
    created_at: Mapped[datetime]


class Lease(Base):
    """Named leases: exactly one worker process holds each at a time (e.g. the scheduler)."""

    __tablename__ = "lease"
    name: Mapped[str] = mapped_column(String(64), primary_key=True)
    holder: Mapped[str] = mapped_column(String(128))
    expires_at: Mapped[datetime]


class PairBuffer(Base):
    """At the relay: a station's last report on a pair's key buffer."""

    __tablename__ = "pair_buffer"
    pair_id: Mapped[str] = mapped_column(ForeignKey("pair.pair_id"), primary_key=True)
    station: Mapped[str] = mapped_column(String(ID_LEN), primary_key=True)
    ready_bits: Mapped[int] = mapped_column(BigInteger)
    owned_ready_bits: Mapped[int] = mapped_column(BigInteger)
    pending_bits: Mapped[int] = mapped_column(BigInteger)
    delivered_bits: Mapped[int] = mapped_column(BigInteger, comment="in the report's window")
    unmet_bits: Mapped[int] = mapped_column(
        BigInteger, server_default="0", comment="asked for and not ready, in the window"
    )
    window_seconds: Mapped[int] = mapped_column(Integer)
    reported_at: Mapped[datetime]


class KeyAlloc(Base):
    """A key allocated from a pair's ready key, at both stations of the pair.

    At the owner (the master's station) the key is handed to the master when allocated
    and its bytes are gone at once. At the other station the bytes wait, sealed, until
    every slave has fetched them or the pair's time-to-live ends.
    """

    __tablename__ = "key_alloc"
    __table_args__ = (
        CheckConstraint("state IN ('waiting', 'delivered', 'expired')", name="state"),
        CheckConstraint("(sealed IS NULL) = (state <> 'waiting')", name="sealed_iff_waiting"),
        CheckConstraint("size_bits > 0 AND size_bits % 8 = 0", name="size"),
        Index("ix_key_alloc_pair_owner_time", "pair_id", "owner", "allocated_at"),
        Index("ix_key_alloc_expiry", "state", "expires_at"),
    )
    key_id: Mapped[str] = mapped_column(String(36), primary_key=True)
    pair_id: Mapped[str] = mapped_column(ForeignKey("pair.pair_id"))
    owner: Mapped[str] = mapped_column(String(ID_LEN), comment="station that allocated it")
    master_sae: Mapped[str] = mapped_column(String(ID_LEN))
    slaves: Mapped[str] = mapped_column(Text, comment="JSON list of slave SAE IDs")
    fetched_by: Mapped[str] = mapped_column(Text, comment="JSON list of slaves served here")
    ranges: Mapped[str] = mapped_column(Text, comment="JSON: segment byte ranges it came from")
    size_bits: Mapped[int] = mapped_column(Integer)
    state: Mapped[str] = mapped_column(String(16))
    allocated_at: Mapped[datetime]
    expires_at: Mapped[datetime]
    settled_at: Mapped[datetime | None]
    sealed: Mapped[bytes | None] = mapped_column(LargeBinary)


class PairHold(Base):
    """A finding of the restore check (restore/comparison.py): one station of a pair is
    behind the other (lost commits: a restored backup, power loss with unsafe
    durability). While a finding about this station itself is open, the pair serves no
    key here; an operator closes it (release), findings about the partner close when
    a later comparison is clean."""

    __tablename__ = "pair_hold"
    __table_args__ = (
        CheckConstraint("behind IN ('self', 'partner')", name="behind"),
        CheckConstraint(
            "reason IN ('owner_behind', 'non_owner_behind', 'deliveries_lost')", name="reason"
        ),
        Index(
            "uq_pair_hold_open",
            "pair_id",
            "behind",
            "reason",
            unique=True,
            sqlite_where=text("released_at IS NULL"),
            postgresql_where=text("released_at IS NULL"),
        ),
    )
    id: Mapped[int] = mapped_column(
        BigInteger().with_variant(Integer, "sqlite"), primary_key=True, autoincrement=True
    )
    pair_id: Mapped[str] = mapped_column(ForeignKey("pair.pair_id"))
    partner: Mapped[str] = mapped_column(String(ID_LEN), comment="the other station")
    behind: Mapped[str] = mapped_column(
        String(8), comment="self: this station lost commits; partner: the other one did"
    )
    reason: Mapped[str] = mapped_column(
        String(32),
        comment=(
            "owner_behind: the segments' owner; non_owner_behind: the other; "
            "deliveries_lost: keys served to slaves were forgotten"
        ),
    )
    segments: Mapped[int] = mapped_column(Integer, comment="segments found behind")
    bytes_behind: Mapped[int] = mapped_column(BigInteger, comment="sum of the differences")
    detected_at: Mapped[datetime]
    released_at: Mapped[datetime | None]
    released_by: Mapped[str | None] = mapped_column(String(ID_LEN))
    release_reason: Mapped[str | None] = mapped_column(String(255))


class PartnerMark(Base):
    """What a partner station has shown of its key deliveries (restore check): the
    highest number of keys of this station's ownership it has reported served to a
    slave. A partner that later reports fewer forgot deliveries (restored backup) and
    could serve those keys again. ``own_floor`` is this station's own: added to the
    count it reports, set when an operator releases a ``deliveries_lost`` hold here."""

    __tablename__ = "partner_mark"
    pair_id: Mapped[str] = mapped_column(ForeignKey("pair.pair_id"), primary_key=True)
    partner: Mapped[str] = mapped_column(
        String(ID_LEN), primary_key=True, comment="the other station"
    )
    partner_fetched: Mapped[int] = mapped_column(
        BigInteger, comment="the highest count of served keys the partner has reported"
    )
    own_floor: Mapped[int] = mapped_column(
        BigInteger, comment="added to this station's own count after a release of deliveries_lost"
    )
    seen_at: Mapped[datetime]


class RegistryGeneration(Base):
    """One counter that every change of the registry or of a pair hold raises (database
    triggers of migration 0011), so a process can keep what it read of them and know at
    the cost of one small read whether it is still true (registry/cache.py)."""

    __tablename__ = "registry_generation"
    __table_args__ = (CheckConstraint("id = 1", name="one_row"),)
    id: Mapped[int] = mapped_column(Integer, primary_key=True, autoincrement=False)
    value: Mapped[int] = mapped_column(BigInteger)


class PeerRegistryView(Base):
    """What the last comparison of shared registry facts with one peer found
    (registry/comparison.py): names of the facts that differ, never their values."""

    __tablename__ = "peer_registry_view"
    peer_id: Mapped[str] = mapped_column(String(ID_LEN), primary_key=True)
    checked_at: Mapped[datetime | None] = mapped_column(
        comment="the last comparison that got an answer (NULL: none has yet)"
    )
    disagreements: Mapped[str] = mapped_column(
        Text, comment="JSON list of {kind, id, field}: the shared facts the two nodes differ on"
    )
    count: Mapped[int] = mapped_column(Integer, comment="how many facts differ")
    last_error: Mapped[str | None] = mapped_column(
        String(255), comment="why the last attempt got no answer, if it failed"
    )


class HistorySample(Base):
    """A compact time series of what the dashboard plots (observability/history.py): one
    value of one series (link rate, pool level, pair buffer, deliveries) for one subject
    (a link or pair ID) at one time; rows older than the retention are deleted."""

    __tablename__ = "history_sample"
    __table_args__ = (Index("ix_history_sample_series_subject_at", "series", "subject", "at"),)
    id: Mapped[int] = mapped_column(
        BigInteger().with_variant(Integer, "sqlite"), primary_key=True, autoincrement=True
    )
    at: Mapped[datetime] = mapped_column(index=True)
    series: Mapped[str] = mapped_column(String(32))
    subject: Mapped[str] = mapped_column(String(ID_LEN))
    value: Mapped[float] = mapped_column(Float)
