"""The head as a long-running service: many teams' searches on one Ray cluster.

Parts: ``config`` (the lab's teams, quotas and tokens), ``auth`` (token hashes and who is
calling), ``ledger`` (CPU-seconds charged per segment, Parquet), ``lab`` (the multi-search
loop around the pure sharing core), ``api`` (HTTP), ``client`` (Python and command-line
client), ``serve`` (the process that ties them together).
"""
