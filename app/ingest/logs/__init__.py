"""Robot logs as recorded (ROS 2 bags with MCAP or SQLite storage, ROS 1 bags) mapped onto a
loop's states by the loop's log mapping."""
