"""One description of a whole network (:mod:`description`), what each node should hold
(:mod:`desired`), what applying it would change (:mod:`changes`), applying it through
the nodes' APIs (:mod:`apply`), and the network's status from every node (:mod:`status`)."""
