"""The base-station part alone: partition node and reference gate (one process). For a
deployment where every robot runs its own controller.
`ros2 launch coverage_fleet base_station.launch.py mission:=/path/mission.yaml`.
Node list from coverage_fleet.cli.graph.base_station_nodes."""


def generate_launch_description():
    # Imported here so that the file can be read and checked without a ROS 2 install.
    import os

    from ament_index_python.packages import get_package_share_directory
    from launch.actions import DeclareLaunchArgument, OpaqueFunction
    from launch.substitutions import LaunchConfiguration

    from coverage_fleet.cli.graph import base_station_nodes, launch_actions
    from launch import LaunchDescription

    share = get_package_share_directory("coverage_fleet")
    default_mission = os.path.join(share, "config", "missions", "orchard_frost_watch.yaml")
    default_tuning = os.path.join(share, "config", "node_tuning.yaml")

    def nodes(context):
        use_sim_time = LaunchConfiguration("use_sim_time").perform(context).lower() == "true"
        density_updates = (
            LaunchConfiguration("density_updates").perform(context).lower() == "true"
        )
        specs = base_station_nodes(
            LaunchConfiguration("mission").perform(context), use_sim_time, density_updates,
            fleet=LaunchConfiguration("fleet_namespace").perform(context),
            tuning_file=LaunchConfiguration("node_tuning").perform(context),
            lockstep=LaunchConfiguration("lockstep").perform(context).lower() == "true",
        )
        return launch_actions(specs)

    return LaunchDescription(
        [
            DeclareLaunchArgument(
                "mission", default_value=default_mission, description="mission file (YAML)"
            ),
            DeclareLaunchArgument(
                "use_sim_time", default_value="false", description="follow /clock"
            ),
            DeclareLaunchArgument(
                "density_updates", default_value="false",
                description="true: the partition node takes nav_msgs/OccupancyGrid densities "
                "from coverage/density in the fleet namespace (README, Density updates)",
            ),
            DeclareLaunchArgument(
                "lockstep", default_value="false",
                description="true: partition once per step of a lockstep simulator started "
                "elsewhere (with use_sim_time:=true; fleet/lockstep.py)",
            ),
            DeclareLaunchArgument(
                "node_tuning", default_value=default_tuning,
                description="node-tuning parameter file for the base station and simulator",
            ),
            DeclareLaunchArgument(
                "fleet_namespace", default_value="",
                description="namespace of the whole fleet (two fleets in one domain)",
            ),
            OpaqueFunction(function=nodes),
        ]
    )
