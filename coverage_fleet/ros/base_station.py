"""The base-station process: the partition node and the reference gate in one executor.
Candidates still travel between them as a topic, so the two nodes can equally run as
separate processes (coverage_fleet_partition, coverage_fleet_gate)."""

from __future__ import annotations

from .gate_node import GateNode
from .partition_node import PartitionNode
from .runtime import main_for


def main() -> None:
    main_for(PartitionNode, GateNode, program="coverage_fleet_base_station")


if __name__ == "__main__":
    main()
