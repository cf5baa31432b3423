#!/usr/bin/env python3
"""A framewise client in Python, to prove the wire contract is usable outside Rust.

Generates stubs from proto/framewise/v1/framewise.proto with grpcio-tools, checks the standard gRPC health
service with the grpcio-health-checking client, lists the services and reads the contract through server
reflection with the grpcio-reflection client (general-purpose gRPC tools work this way), then opens a session,
sends 5 synthetic frames (no patient data) and checks that each is answered once, with the caution.

Decision support only, not a diagnosis: framewise outputs are probabilities that can be wrong and must be
confirmed by a qualified clinician; check local regulations before any clinical use.
"""
import argparse
import os
import sys
import tempfile

import grpc
import numpy as np
from grpc_health.v1 import health_pb2, health_pb2_grpc
from grpc_reflection.v1alpha.proto_reflection_descriptor_database import ProtoReflectionDescriptorDatabase
from grpc_tools import protoc

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--target", required=True, help="host:port")
    args = ap.parse_args()
    out = tempfile.mkdtemp(prefix="framewise-py-")
    proto_dir = os.path.join(ROOT, "proto", "proto")
    rc = protoc.main(["protoc", f"-I{proto_dir}", f"--python_out={out}", f"--grpc_python_out={out}",
                      os.path.join(proto_dir, "framewise", "v1", "framewise.proto")])
    if rc != 0:
        sys.exit(f"protoc failed with {rc}")
    sys.path.insert(0, out)
    from framewise.v1 import framewise_pb2 as pb, framewise_pb2_grpc as rpc

    channel = grpc.insecure_channel(args.target)
    health = health_pb2_grpc.HealthStub(channel)
    status = health.Check(health_pb2.HealthCheckRequest(service="")).status
    print("health:", health_pb2.HealthCheckResponse.ServingStatus.Name(status))
    if status != health_pb2.HealthCheckResponse.SERVING:
        sys.exit("the server is not SERVING")
    named = health.Check(health_pb2.HealthCheckRequest(service="framewise.v1.FrameAnalysis")).status
    if named != health_pb2.HealthCheckResponse.SERVING:
        sys.exit("framewise.v1.FrameAnalysis is not SERVING")

    # Server reflection: the services, and the session rpc's types read from the server alone.
    reflection = ProtoReflectionDescriptorDatabase(channel)
    services = set(reflection.get_services())
    print("reflection:", ", ".join(sorted(services)))
    if not {"framewise.v1.FrameAnalysis", "grpc.health.v1.Health"} <= services:
        sys.exit(f"reflection lists {sorted(services)}")
    described = reflection.FindFileContainingSymbol("framewise.v1.FrameAnalysis")
    rpcs = [m.name for s in described.service for m in s.method]
    if "RunSession" not in rpcs:
        sys.exit(f"reflection describes {rpcs}")

    rng = np.random.default_rng(3)

    def inputs():
        yield pb.SessionInput(opening=pb.SessionOpening(policy=pb.FRAME_POLICY_EVERY_FRAME))
        for seq in range(5):
            pixels = rng.integers(0, 256, (48, 64, 3), dtype=np.uint8)
            yield pb.SessionInput(frame=pb.Frame(seq=seq, capture_time_us=1_000_000 + seq * 33_333,
                                                 format=pb.PIXEL_FORMAT_RGB8, width=64, height=48,
                                                 data=pixels.tobytes()))

    stub = rpc.FrameAnalysisStub(channel)
    outputs = list(stub.RunSession(inputs()))
    kinds = [o.WhichOneof("item") for o in outputs]
    if kinds[0] != "accepted" or kinds[-1] != "summary":
        sys.exit(f"unexpected output order: {kinds}")
    caution = outputs[0].accepted.caution
    if "decision support" not in caution.lower():
        sys.exit("no caution in the session's accepted message")
    answers = [o.answer for o in outputs if o.WhichOneof("item") == "answer"]
    if sorted(a.seq for a in answers) != list(range(5)):
        sys.exit(f"answers do not cover the frames: {[a.seq for a in answers]}")
    for a in answers:
        if a.caution != caution or a.WhichOneof("outcome") != "result":
            sys.exit(f"answer {a.seq} lacks the caution or a result")
        if abs(sum(a.result.raw) - 1.0) > 1e-4:
            sys.exit(f"answer {a.seq}: probabilities sum to {sum(a.result.raw)}")
    models = stub.ListModelCards(pb.ModelCardsRequest())
    print("models:", ", ".join(m.identity.name for m in models.models))
    print("answers:", len(answers))


if __name__ == "__main__":
    main()
