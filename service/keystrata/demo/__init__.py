"""`keystrata demo`: a whole invented network on loopback (one relay, three stations)."""
