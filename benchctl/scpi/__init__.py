"""Pure SCPI-1999 / IEEE 488.2 protocol core: numbers, blocks, error queue, command tree.

No I/O here; imports only numpy and :mod:`benchctl.errors`. Used by the drivers (client
side: response parsing, blocks) and by the simulated instruments (server side: the
command tree, parameter parsing, response formatting, the error queue).
"""

from benchctl.scpi.blocks import (
    IncompleteBlock,
    block_dtype,
    decode_block,
    encode_block,
    parse_block_header,
)
from benchctl.scpi.errors import STANDARD_ERRORS, ErrorQueue, ScpiError, error_message
from benchctl.scpi.message import ProgramUnit, parse_unit, split_params, split_units
from benchctl.scpi.mnemonic import mnemonic_forms
from benchctl.scpi.numbers import (
    MULTIPLIERS,
    NAN_VALUE,
    OVERFLOW_VALUE,
    format_boolean,
    format_list,
    format_nr1,
    format_nr2,
    format_nr3,
    format_string,
    parse_boolean,
    parse_character,
    parse_error_response,
    parse_numeric,
    parse_response_boolean,
    parse_response_list,
    parse_response_number,
    parse_response_string,
    parse_string,
)
from benchctl.scpi.tree import INTERRUPTED_QUERY, UNTERMINATED_QUERY, Call, CommandTree

__all__ = [
    "INTERRUPTED_QUERY",
    "MULTIPLIERS",
    "NAN_VALUE",
    "OVERFLOW_VALUE",
    "STANDARD_ERRORS",
    "UNTERMINATED_QUERY",
    "Call",
    "CommandTree",
    "ErrorQueue",
    "IncompleteBlock",
    "ProgramUnit",
    "ScpiError",
    "block_dtype",
    "decode_block",
    "encode_block",
    "error_message",
    "format_boolean",
    "format_list",
    "format_nr1",
    "format_nr2",
    "format_nr3",
    "format_string",
    "mnemonic_forms",
    "parse_block_header",
    "parse_boolean",
    "parse_character",
    "parse_error_response",
    "parse_numeric",
    "parse_response_boolean",
    "parse_response_list",
    "parse_response_number",
    "parse_response_string",
    "parse_string",
    "parse_unit",
    "split_params",
    "split_units",
]
