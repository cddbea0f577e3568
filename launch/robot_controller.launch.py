"""One robot's controller alone, in the robot's namespace (run it on the robot).
`ros2 launch coverage_fleet robot_controller.launch.py robot:=rover_1
 vehicle_file:=/path/vehicle.yaml mission:=/path/mission.yaml`.
Node from coverage_fleet.cli.graph.controller_node_spec. Safety: keep an emergency stop
within reach and a geofence on the robot itself; this node only sends commands."""


def generate_launch_description():
    # Imported here so that the file can be read and checked without a ROS 2 install.
    import os

    from ament_index_python.packages import get_package_share_directory
    from launch.actions import DeclareLaunchArgument, OpaqueFunction
    from launch.substitutions import LaunchConfiguration

    from coverage_fleet.cli.graph import controller_node_spec, launch_actions
    from launch import LaunchDescription

    share = get_package_share_directory("coverage_fleet")
    default_mission = os.path.join(share, "config", "missions", "orchard_frost_watch.yaml")

    def nodes(context):
        spec = controller_node_spec(
            LaunchConfiguration("mission").perform(context),
            LaunchConfiguration("robot").perform(context),
            LaunchConfiguration("vehicle_file").perform(context) or None,
            use_sim_time=LaunchConfiguration("use_sim_time").perform(context).lower() == "true",
            fleet=LaunchConfiguration("fleet_namespace").perform(context),
        )
        return launch_actions([spec])

    return LaunchDescription(
        [
            DeclareLaunchArgument("robot", description="robot name (its namespace)"),
            DeclareLaunchArgument(
                "vehicle_file", default_value="",
                description="vehicle parameter file (default: the mission roster's)",
            ),
            DeclareLaunchArgument(
                "mission", default_value=default_mission, description="mission file (YAML)"
            ),
            DeclareLaunchArgument(
                "use_sim_time", default_value="false", description="follow /clock"
            ),
            DeclareLaunchArgument(
                "fleet_namespace", default_value="",
                description="namespace of the whole fleet (two fleets in one domain)",
            ),
            OpaqueFunction(function=nodes),
        ]
    )
