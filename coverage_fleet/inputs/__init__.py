"""The one validation path for every input file (mission, vehicle, density, raster).

- `reader.py`: reading a file (missing, directory, unreadable, binary) and parsing YAML
  (duplicate keys refused, YAML 1.2 numbers) -- every fault a Problem, never a traceback.
- `fields.py`: the field checks (required, type, finite, range, one-of, unknown key, list
  shape) and the one wording of each fault; `Collector` gathers every problem of a file.
- `names.py`: robot names (a ROS name segment) and mission names (a safe file name).

Cross-cutting like `errors.py`: imports nothing else of the package, so every layer may use it.
"""
