"""What a robot's controller applied instead of a fresh solution (ControlStep.fallback, the
`fallback` column of a trial's robot logs, the solve reports of the ROS graph). Kept apart
from controller.py so that reading a trial does not load the solver."""

FALLBACK_NONE = ""
FALLBACK_PREVIOUS_PLAN = "previous plan"
FALLBACK_BRAKING = "braking"
#: Braking because the keep-apart rows are not known (no snapshot of the neighbours'
#: positions yet, or the newest too old): no solve was attempted, so it is no solver
#: failure; logs and reports count these brakes on their own (RobotLog.keep_apart_brakes).
FALLBACK_KEEP_APART_BRAKE = "keep-apart brake"
