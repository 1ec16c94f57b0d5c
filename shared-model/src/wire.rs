//! Wire messages between a board and the host, and their framing (see PROTOCOL.md).
