"""A simulated fleet from a mission file: base station, one controller per robot, headless
simulator. `ros2 launch coverage_fleet fleet_sim.launch.py mission:=/path/mission.yaml`.
The node list comes from coverage_fleet.cli.graph.fleet_nodes, as in `coverage-fleet launch`.
Safety: a simulation only; see the README before connecting real robots."""


def generate_launch_description():
    # Imported here so that the file can be read and checked without a ROS 2 install.
    import os

    from ament_index_python.packages import get_package_share_directory
    from launch.actions import DeclareLaunchArgument, OpaqueFunction
    from launch.substitutions import LaunchConfiguration

    from coverage_fleet.cli.graph import fleet_nodes, launch_actions
    from launch import LaunchDescription

    share = get_package_share_directory("coverage_fleet")
    default_mission = os.path.join(share, "config", "missions", "orchard_frost_watch.yaml")
    default_tuning = os.path.join(share, "config", "node_tuning.yaml")

    def nodes(context):
        duration = LaunchConfiguration("duration").perform(context)
        specs = fleet_nodes(
            LaunchConfiguration("mission").perform(context),
            LaunchConfiguration("sim_mode").perform(context),
            duration=float(duration) if duration else 0.0,
            density_updates=LaunchConfiguration("density_updates").perform(context).lower()
            == "true",
            fleet=LaunchConfiguration("fleet_namespace").perform(context),
            tuning_file=LaunchConfiguration("node_tuning").perform(context),
        )
        return launch_actions(specs)

    return LaunchDescription(
        [
            DeclareLaunchArgument(
                "mission", default_value=default_mission, description="mission file (YAML)"
            ),
            DeclareLaunchArgument(
                "sim_mode", default_value="realtime", description="realtime or lockstep"
            ),
            DeclareLaunchArgument(
                "duration", default_value="0",
                description="simulated seconds before the run ends (0: the mission's)",
            ),
            DeclareLaunchArgument(
                "density_updates", default_value="false",
                description="true: the partition node takes nav_msgs/OccupancyGrid densities "
                "from coverage/density in the fleet namespace (README, Density updates)",
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
