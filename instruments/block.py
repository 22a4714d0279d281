"""IEEE 488.2 arbitrary block program/response data (IEEE Std 488.2-1992, 7.7.6 and 8.7.9).

Two forms exist:

* definite length: ``#<n><length><payload>`` where ``<n>`` is one non-zero digit giving the
  number of digits of ``<length>``, the payload byte count;
* indefinite length: ``#0<payload>`` terminated by a newline sent with END; on a socket
  transport there is no END, so the payload runs up to the final newline of the reply.

Payloads are decoded with :func:`numpy.frombuffer`, never element by element, so a 10 M-sample
record costs one pass of memory at most.
"""

from __future__ import annotations

import numpy as np

from labseq_instruments.errors import BlockFormatError

#: Payload formats a scope may send, by the name a command map uses.
DATA_FORMATS: dict[str, str] = {
    "int8": "i1",
    "uint8": "u1",
    "int16": "i2",
    "uint16": "u2",
    "float32": "f4",
}
#: Byte orders by the name a command map uses, as numpy byte-order characters.
BYTE_ORDERS: dict[str, str] = {"big": ">", "little": "<"}

_HASH = ord("#")
_NEWLINE = b"\n"


def payload_dtype(data_format: str, byte_order: str = "big") -> np.dtype:
    """Return the numpy dtype of one payload item.

    Parameters
    ----------
    data_format : {"int8", "uint8", "int16", "uint16", "float32"}
    byte_order : {"big", "little"}
        Ignored for one-byte items.
    """
    try:
        code = DATA_FORMATS[data_format]
    except KeyError:
        raise BlockFormatError(
            f"unknown data format {data_format!r}; valid: {', '.join(DATA_FORMATS)}"
        ) from None
    try:
        order = BYTE_ORDERS[byte_order]
    except KeyError:
        raise BlockFormatError(
            f"unknown byte order {byte_order!r}; valid: {', '.join(BYTE_ORDERS)}"
        ) from None
    return np.dtype(order + code)


def length_digit_count(prefix: bytes) -> int:
    """Parse the first two bytes of a block (``#`` and the digit count).

    Returns the number of length digits that follow, 0 for the indefinite form.
    """
    if len(prefix) < 2:
        raise BlockFormatError(f"block header too short: {bytes(prefix)!r}")
    if prefix[0] != _HASH:
        raise BlockFormatError(
            f"block does not start with '#' (IEEE 488.2 8.7.9): starts with {bytes(prefix[:2])!r}"
        )
    digit = prefix[1]
    if not 0x30 <= digit <= 0x39:
        raise BlockFormatError(f"block header digit count is not a digit: {bytes(prefix[:2])!r}")
    return digit - 0x30


def parse_length(digits: bytes) -> int:
    """Parse the ``<length>`` field of a definite block header (ASCII decimal digits only)."""
    if not bytes(digits).isdigit():  # ASCII digits only, and at least one
        raise BlockFormatError(f"block length field is not all digits: {bytes(digits)!r}")
    return int(digits)


def check_item_size(byte_count: int, dtype: np.dtype) -> None:
    """Refuse a payload that is not a whole number of items."""
    if byte_count % dtype.itemsize:
        raise BlockFormatError(
            f"block payload of {byte_count} bytes is not a multiple of the "
            f"{dtype.itemsize}-byte item size ({dtype.name})"
        )


def split_block(data: bytes | bytearray | memoryview) -> memoryview:
    """Return the payload of one complete block reply, without copying it.

    A definite block may be followed by the newline that ends the reply; anything else after
    the announced length is refused. An indefinite block must end with a newline, which is not
    part of the payload.
    """
    view = memoryview(data).cast("B")
    digit_count = length_digit_count(view[:2])
    if digit_count == 0:
        if view[-1:] != _NEWLINE:
            raise BlockFormatError("indefinite block (#0) does not end with a newline")
        return view[2:-1]
    header_end = 2 + digit_count
    if len(view) < header_end:
        raise BlockFormatError(
            f"block header announces {digit_count} length digits but only "
            f"{len(view) - 2} bytes follow"
        )
    length = parse_length(view[2:header_end])
    payload_end = header_end + length
    if len(view) < payload_end:
        raise BlockFormatError(
            f"block announces {length} payload bytes but only {len(view) - header_end} arrived"
        )
    trailer = bytes(view[payload_end:])
    if trailer not in (b"", b"\n", b"\r\n"):
        raise BlockFormatError(
            f"{len(trailer)} unexpected bytes after the {length}-byte block: {trailer[:16]!r}"
        )
    return view[header_end:payload_end]


def decode_payload(
    payload: bytes | bytearray | memoryview, data_format: str, byte_order: str = "big"
) -> np.ndarray:
    """Decode a payload into a native-endian numpy array (a view when no swap is needed)."""
    return decode_items(payload, payload_dtype(data_format, byte_order))


def decode_items(payload: bytes | bytearray | memoryview, dtype: np.dtype) -> np.ndarray:
    """:func:`decode_payload` with the item type already looked up (:func:`payload_dtype`)."""
    check_item_size(len(payload), dtype)
    values = np.frombuffer(payload, dtype=dtype)
    return values if dtype.isnative else values.astype(dtype.newbyteorder("="))


def parse_block(
    data: bytes | bytearray | memoryview, data_format: str, byte_order: str = "big"
) -> np.ndarray:
    """Parse one complete block reply into an array of ``data_format`` items.

    Implements the arbitrary block response data of IEEE Std 488.2-1992, 8.7.9.

    Raises
    ------
    BlockFormatError
        Missing ``#``, a non-digit count or length, fewer bytes than announced, trailing bytes,
        or a payload that is not a whole number of items.
    """
    return decode_payload(split_block(data), data_format, byte_order)


def encode_block(payload: bytes | np.ndarray, *, definite: bool = True) -> bytes:
    """Wrap ``payload`` in a block header (the inverse of :func:`split_block`).

    A definite block gets no trailing newline; an indefinite one gets the newline that ends it.
    """
    raw = payload.tobytes() if isinstance(payload, np.ndarray) else bytes(payload)
    if not definite:
        return b"#0" + raw + _NEWLINE
    length = str(len(raw)).encode("ascii")
    if len(length) > 9:
        raise BlockFormatError(f"payload of {len(raw)} bytes exceeds a definite block's 9 digits")
    return b"#" + str(len(length)).encode("ascii") + length + raw


def signed_codes(codes: np.ndarray) -> tuple[np.ndarray, int]:
    """Unsigned codes as the signed codes of the same width, and the shift applied.

    An unsigned code ``u`` becomes ``u − 2**(bits−1)`` (0…255 → −128…127), exactly, so a capture
    keeps one signed code type whatever its scope sends; a reference or code limit given in
    unsigned codes moves by the returned shift. Signed and float codes come back unchanged.
    """
    if codes.dtype.kind != "u":
        return codes, 0
    bits = codes.dtype.itemsize * 8
    shift = 1 << (bits - 1)
    # Flipping the top bit is subtracting 2**(bits-1) modulo 2**bits: one pass, no overflow.
    flipped = codes ^ codes.dtype.type(shift)
    return flipped.view(codes.dtype.str.replace("u", "i")), shift


def parse_ascii_values(text: str) -> np.ndarray:
    """Comma-separated numbers (an ASCII waveform transfer) as float32 values."""
    try:
        values = np.array(text.split(","), dtype=np.float64)
    except ValueError:
        raise BlockFormatError(
            f"ASCII waveform is not a list of comma-separated numbers: {text[:40]!r}"
        ) from None
    if not np.isfinite(values).all():
        raise BlockFormatError("ASCII waveform holds a value that is not a finite number")
    return values.astype(np.float32)
