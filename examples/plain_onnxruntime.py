"""Call an rtemu bundle from plain onnxruntime, without rtemu (INVENTED demo instrument).

The body below is the snippet of the README, verbatim; tests/test_examples.py runs this
file in a process that cannot import rtemu.

Usage:  python examples/plain_onnxruntime.py MODEL.onnx
"""

import sys

MODEL = sys.argv[1] if len(sys.argv) > 1 else "rtemu-demo/emulator.onnx"

# --- README snippet (with the file name as a variable) ---
import json, numpy as np, onnxruntime as ort
sess = ort.InferenceSession(MODEL, providers=["CPUExecutionProvider"])
meta = sess.get_modelmeta().custom_metadata_map
levels = json.loads(meta["rtemu.pressure_hpa"])              # the fixed grid, input order
n, L, C = 2, len(levels), len(json.loads(meta["rtemu.channels"]))
feeds = {"air_temperature": np.full((n, L), 250, np.float32),
         "specific_humidity": np.full((n, L), 1e-4, np.float32),
         "surface_temperature": np.full(n, 270, np.float32),
         "surface_emissivity": np.full((n, C), 0.9, np.float32),
         "sensor_zenith_angle": np.zeros(n, np.float32),
         "surface_air_pressure": np.full(n, 1013.25, np.float32)}    # the ground [hPa]
bt, jt, jq, jts, jem, sigma, flag = sess.run(None, feeds)    # [n,C], [n,C,L] x2, [n,C] x3, [n,C]
# --- end of snippet ---

print("brightness_temperature", bt.shape, "jacobian_air_temperature", jt.shape, "quality_flag", flag.shape)
print("flags of this (isothermal, off-envelope) state:", flag[0].tolist())
