"""Trial recordings in MCAP (the open log format the ROS 2 bag tools read and write),
through the maintained `mcap` package; no rclpy here, so a recording can be read anywhere.

What a recording holds (profile "ros2", the ROS 2 bag conventions):
- one channel per topic, message encoding "cdr": the raw CDR bytes as they travelled;
- one schema per message type, encoding "ros2msg": the `.msg` definition with its
  dependencies (coverage_fleet.ros.message_definitions), so any MCAP reader decodes it;
- metadata records: "provenance" (package version and commit, Python and library versions,
  ROS distribution and middleware, command line), "vehicle_files" and "vehicle_sha256"
  (robot -> the vehicle file it ran with, its sha256), "run" (mission name and file,
  simulation mode, duration, seed, start time);
- attachments: the mission file as given (`mission/<name>`), every robot's vehicle file
  (`vehicles/<robot>.yaml`) and the mission as run (`mission_as_run.yaml`, whose roster
  names those attachments), so the recording alone rebuilds the trial.

Written incrementally: messages are grouped in chunks of at most CHUNK_BYTES (64 KiB,
against the library's 1 MiB default, which can hold a whole trial) and the recorder closes
the chunk in progress every FLUSH_PERIOD seconds (`RecordingWriter.flush`), handing it to
the operating system. A crash or SIGKILL of the recorder therefore loses at most the chunk
in progress: everything before it reads back (`read_recording` stops at the first
incomplete record and says so).
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from pathlib import Path

from mcap.records import Attachment, Channel, DataEnd, Footer, Header, Message, Metadata, Schema
from mcap.stream_reader import StreamReader
from mcap.writer import CompressionType, Writer

import coverage_fleet

from .message_definitions import full_type_name, message_definition

#: Largest chunk before it is closed (bytes of uncompressed records).
CHUNK_BYTES = 64 * 1024
#: Seconds between forced chunk ends: a crash loses at most this much of the run.
FLUSH_PERIOD = 1.0

PROFILE = "ros2"
SCHEMA_ENCODING = "ros2msg"
MESSAGE_ENCODING = "cdr"
MISSION_AS_RUN = "mission_as_run.yaml"
YAML_MEDIA_TYPE = "application/yaml"


def vehicle_attachment(robot: str) -> str:
    return f"vehicles/{robot}.yaml"


class RecordingWriter:
    """An MCAP file being written (never overwrites a file)."""

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        # flush() pushes this file's buffer to the operating system (close() too).
        self._file = self.path.open("xb")
        self._writer = Writer(
            self._file, chunk_size=CHUNK_BYTES, compression=CompressionType.ZSTD
        )
        self._writer.start(PROFILE, f"coverage_fleet {coverage_fleet.__version__}")
        self._schemas: dict[str, int] = {}
        self._channels: dict[str, int] = {}
        self._sequence: dict[int, int] = {}
        self.closed = False

    def add_metadata(self, name: str, values: dict[str, str]) -> None:
        self._writer.add_metadata(name, {str(k): str(v) for k, v in values.items()})

    def add_attachment(self, name: str, data: bytes, media_type: str = YAML_MEDIA_TYPE) -> None:
        now = time.time_ns()
        self._writer.add_attachment(now, now, name, media_type, data)

    def channel(self, topic: str, type_name: str) -> int:
        """The channel of a topic (registered, with its type's schema, on first use)."""
        if topic in self._channels:
            return self._channels[topic]
        type_name = full_type_name(type_name)
        if type_name not in self._schemas:
            self._schemas[type_name] = self._writer.register_schema(
                type_name, SCHEMA_ENCODING, message_definition(type_name).encode()
            )
        channel_id = self._writer.register_channel(
            topic, MESSAGE_ENCODING, self._schemas[type_name]
        )
        self._channels[topic] = channel_id
        self._sequence[channel_id] = 0
        return channel_id

    def write(self, channel_id: int, data: bytes, log_time_ns: int) -> None:
        self._sequence[channel_id] += 1
        self._writer.add_message(
            channel_id, log_time_ns, bytes(data), log_time_ns, self._sequence[channel_id]
        )

    def flush(self) -> None:
        """End the chunk in progress and hand everything to the operating system."""
        if not self.closed:
            self._writer.flush()

    def close(self) -> None:
        """Write the summary and footer: the file is complete."""
        if not self.closed:
            self.closed = True
            self._writer.finish()
            self._file.close()


@dataclass(frozen=True)
class RecordedMessage:
    topic: str
    type_name: str
    data: bytes
    #: Receive time at the recorder (ns since the epoch, wall clock).
    log_time: int


@dataclass
class Recording:
    """What a recording file holds, read in file order."""

    path: Path
    profile: str = ""
    metadata: dict[str, dict[str, str]] = field(default_factory=dict)
    attachments: dict[str, bytes] = field(default_factory=dict)
    #: topic -> full type name ("pkg/msg/Type")
    channels: dict[str, str] = field(default_factory=dict)
    schemas: dict[str, str] = field(default_factory=dict)
    messages: list[RecordedMessage] = field(default_factory=list)
    #: False when the file ends early (recorder killed): what came before was recovered.
    complete: bool = False
    #: Why reading stopped early (empty when complete).
    problem: str = ""

    def count(self, topic: str) -> int:
        return sum(1 for m in self.messages if m.topic == topic)


def read_recording(path: str | Path) -> Recording:
    """Read every record of a recording in order. A truncated file (the recorder was
    killed) is read up to its last complete record: the chunks written before are
    recovered, `complete` is False and `problem` says where reading stopped."""
    path = Path(path)
    recording = Recording(path)
    schemas: dict[int, str] = {}
    channels: dict[int, tuple[str, str]] = {}
    with path.open("rb") as handle:
        reader = StreamReader(handle, validate_crcs=True)
        try:
            for record in reader.records:
                match record:
                    case Schema():
                        schemas[record.id] = record.name
                        recording.schemas[record.name] = record.data.decode()
                    case Channel():
                        type_name = schemas.get(record.schema_id, "")
                        channels[record.id] = (record.topic, type_name)
                        recording.channels[record.topic] = type_name
                    case Message():
                        topic, type_name = channels[record.channel_id]
                        recording.messages.append(
                            RecordedMessage(topic, type_name, record.data, record.log_time)
                        )
                    case Metadata():
                        recording.metadata[record.name] = dict(record.metadata)
                    case Attachment():
                        recording.attachments[record.name] = bytes(record.data)
                    case DataEnd() | Footer():
                        recording.complete = True
                        break
                    case Header():
                        recording.profile = record.profile
        # A file cut short fails in the reader (McapError: end of file), in a struct read
        # or inside the decompressor of the last chunk, depending on where the cut is.
        except Exception as error:
            recording.problem = (
                f"the recording ends early at byte {handle.tell()} "
                f"({type(error).__name__}: {error}); "
                f"{len(recording.messages)} messages in complete chunks were recovered"
            )
    if not recording.complete and not recording.problem:
        recording.problem = "the recording ends without its summary"
    return recording
