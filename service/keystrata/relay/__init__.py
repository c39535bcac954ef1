"""The trusted-node key relay: the arithmetic and the fair share (pure), the relay
operation, the stations' side of a segment, pair key buffers and the relay's scheduler."""
