"""Demo data: the invented warehouse-rover fleet (fleet.py), its ROS 2 bag variant (bag.py) and a video writer.

Nothing in the pipeline imports this package; the CLI's `demo` and `make-sample` commands load it when called.
"""
