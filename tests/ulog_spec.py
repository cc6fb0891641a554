"""A small ULog writer for tests, following the published "ULog File Format" specification byte for byte."""

import struct

# =============================================================================================== ULog writer
# Layout per the PX4 "ULog File Format" spec: 16-byte header = magic 'U' 'L' 'o' 'g' 0x01 0x12 0x35, version byte,
# uint64 start timestamp (us); then messages, each a 3-byte header {uint16 msg_size (payload only), uint8
# msg_type}. 'B' flag bits = uint8 compat[8], uint8 incompat[8], uint64 appended_offsets[3] (must be first);
# 'F' format = "name:type field;type field;..." (arrays as "float[3] name", nested types by their format name);
# 'I' info = uint8 key_len, key "type name", value bytes; 'A' add-logged = uint8 multi_id, uint16 msg_id, name;
# 'D' data = uint16 msg_id, the packed fields; 'L' logging = uint8 level (ASCII '0'..'7'), uint64 timestamp, text;
# 'O' dropout = uint16 duration in ms. All little-endian, strings without a terminating NUL.

ULOG_MAGIC = b"ULog\x01\x12\x35"


def _msg(kind: str, payload: bytes) -> bytes:
    return struct.pack("<HB", len(payload), ord(kind)) + payload


class ULogWriter:
    def __init__(self, start_us: int):
        self.head = ULOG_MAGIC + bytes([1]) + struct.pack("<Q", start_us)
        self.defs = [_msg("B", bytes(8) + bytes(8) + struct.pack("<3Q", 0, 0, 0))]
        self.data: list[bytes] = []

    def info(self, type_name: str, key: str, value: bytes):
        k = f"{type_name} {key}".encode()
        self.defs.append(_msg("I", bytes([len(k)]) + k + value))

    def format(self, spec: str):
        self.defs.append(_msg("F", spec.encode()))

    def add_logged(self, multi_id: int, msg_id: int, name: str):
        self.data.append(_msg("A", struct.pack("<BH", multi_id, msg_id) + name.encode()))

    def record(self, msg_id: int, payload: bytes):
        self.data.append(_msg("D", struct.pack("<H", msg_id) + payload))

    def log(self, level: str, t_us: int, text: str):
        self.data.append(_msg("L", bytes([ord(level)]) + struct.pack("<Q", t_us) + text.encode()))

    def dropout(self, duration_ms: int):
        self.data.append(_msg("O", struct.pack("<H", duration_ms)))

    def bytes(self) -> bytes:
        return self.head + b"".join(self.defs) + b"".join(self.data)
