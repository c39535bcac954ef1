"""Key-supply planning on the node: the link model (``keystrata_physics``) applied to the
registry's physical profiles, the pairs' fair shares and their measured demand."""
