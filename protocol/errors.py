"""Exceptions raised by protocol/ (codec errors and link errors)."""

from __future__ import annotations


class ProtocolError(Exception):
    """Base class of everything protocol/ raises."""


class CobsError(ProtocolError):
    """Bytes that are not a valid COBS encoding."""


class DecodeError(ProtocolError):
    """A frame with a good CRC that is not a valid message."""


class UnknownType(DecodeError):
    """The frame's type id is not in the registry."""

    def __init__(self, msg_type: int) -> None:
        super().__init__(f"unknown message type 0x{msg_type:02X}")
        self.msg_type = msg_type


class BadLength(DecodeError):
    """The payload length does not match the message type's layout."""

    def __init__(self, msg_type: int, got: int, expected: int) -> None:
        super().__init__(
            f"message type 0x{msg_type:02X}: payload of {got} bytes, expected {expected}"
        )
        self.msg_type = msg_type
        self.got = got
        self.expected = expected


class LinkError(ProtocolError):
    """Base class of errors of the serial link; the message is meant for the user."""


class PortNotFound(LinkError):
    """No such port (device path does not exist, host refuses the connection, bad URL)."""


class PortBusy(LinkError):
    """The port is in use by another program."""


class PortPermission(LinkError):
    """The operating system refused access to the port."""


class LinkTimeout(LinkError):
    """No reply to a request within the timeout, after all retries."""


class NoResponse(LinkTimeout):
    """Nothing answered the handshake."""


class LinkLost(LinkError):
    """The port went away (cable unplugged, pty closed, socket closed) or the device fell silent."""


class StopOnly(LinkError):
    """A frame other than Stop refused: a stop is in progress (see Link.enter_stop_only)."""


class DeviceReset(LinkError):
    """The device restarted (its boot id changed) since the handshake."""


class VersionMismatch(LinkError):
    """Host and device speak different protocol versions."""

    def __init__(self, host_version: int, device_version: int) -> None:
        super().__init__(
            f"protocol version mismatch: this host speaks version {host_version}, "
            f"the device speaks version {device_version}; update the firmware or the host tool "
            "so both use the same version"
        )
        self.host_version = host_version
        self.device_version = device_version


class NakError(LinkError):
    """The device refused a request with a negative acknowledgement."""

    def __init__(self, acked_type: int, code: int, detail: float) -> None:
        from protocol.messages import NakCode, type_name

        try:
            code_name = NakCode(code).name
        except ValueError:
            code_name = f"code {code}"
        super().__init__(
            f"device refused {type_name(acked_type)}: {code_name} (detail {detail:g})"
        )
        self.acked_type = acked_type
        self.code = code
        self.detail = detail
