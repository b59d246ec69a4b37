"""The joint planner: preload, torque and angle from bolt and joint data (VDI 2230, ISO 898-1)."""
