"""Code that runs on the robot's hub (MicroPython) and, unchanged, inside the host's simulator."""
