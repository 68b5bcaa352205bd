"""`limen receive`, the DICOM Storage SCP, on 127.0.0.1 against pynetdicom's own SCU (a reference
implementation of the DICOM upper layer) sending images of the project's simulator.

Sources (docs/references.md): DICOM PS3.4 Annex A (C-ECHO), Annex B (Storage Service Class: SOP Class UIDs of
Table B.5-1, C-STORE statuses of Table B.2-1); DICOM PS3.8 sections 9.3.3.2 (presentation context results:
3 abstract syntax not supported, 4 transfer syntaxes not supported), 9.3.4 (A-ASSOCIATE-RJ: result 1
rejected-permanent, source 1 service-user, reason 3 calling AE title not recognised, 7 called AE title not
recognised), 9.3.5 (P-DATA-TF), 9.3.8 (A-ABORT); PS3.10 section 7.1 (Part 10 file: preamble, "DICM", meta).
"""

from __future__ import annotations

import hashlib
import io
import os
import signal
import socket
import struct
import subprocess
import sys
import threading
import time
from pathlib import Path

import pydicom
import pytest
from click.testing import CliRunner
from qc_helpers import D1, DIRECT, night, write_config

from scorer.cli import main
from scorer.errors import LimenError
from scorer.qc.config import ReceiveConfig, load_config, load_receive_config
from scorer.qc.inbox import InboxImage, Rejected, examine, list_files
from scorer.qc.receiver import (
    CANNOT_UNDERSTAND,
    DOES_NOT_MATCH_SOP_CLASS,
    STORAGE_SOP_CLASSES,
    SUCCESS,
    TRANSFER_SYNTAXES,
    Receiver,
    file_name_for,
)

pynetdicom = pytest.importorskip("pynetdicom")
from pynetdicom import AE  # noqa: E402
from pynetdicom import sop_class as sc  # noqa: E402

OURS, MODALITY = "LIMEN_QC", "MAM2_QC"
CT = "1.2.840.10008.5.1.4.1.1.2"  # CT Image Storage (PS3.4 Table B.5-1): not ours to receive
MG_PROCESSING = "1.2.840.10008.5.1.4.1.1.1.2.1"
MG_PRESENTATION = "1.2.840.10008.5.1.4.1.1.1.2"


# --------------------------------------------------------------------------- helpers
class Node:
    """A receiver on 127.0.0.1 and a free port, in this process; its association lines collected."""

    def __init__(self, inbox, callers=(MODALITY,)):
        self.lines: list[str] = []
        self.config = ReceiveConfig(inbox=str(inbox), calling_ae_titles=tuple(callers), ae_title=OURS, port=11112)
        self.receiver = Receiver(self.config, log=self.lines.append, port=0)
        self.host, self.port = self.receiver.start()

    def wait_lines(self, n, timeout=20.0):
        deadline = time.monotonic() + timeout
        while len(self.lines) < n and time.monotonic() < deadline:
            time.sleep(0.02)
        assert len(self.lines) >= n, self.lines
        return self.lines


@pytest.fixture
def node(tmp_path):
    n = Node(tmp_path / "inbox")
    yield n
    n.receiver.stop(grace_s=2)


def scu(title=MODALITY, contexts=(MG_PROCESSING,), transfer_syntaxes=None):
    ae = AE(ae_title=title)
    ae.acse_timeout = ae.dimse_timeout = ae.network_timeout = 20
    for uid in contexts:
        if transfer_syntaxes is None:
            ae.add_requested_context(uid)
        else:
            ae.add_requested_context(uid, transfer_syntaxes)
    ae.add_requested_context(sc.Verification)
    return ae


def meta_end(data: bytes) -> int:
    """Offset of the dataset after a Part 10 file's preamble and group-0002 meta (PS3.10 7.1)."""
    assert data[128:132] == b"DICM" and data[132:138] == b"\x02\x00\x00\x00UL"
    # preamble, "DICM", the explicit-VR group length element (12 bytes), then the group's other elements
    return 132 + 12 + struct.unpack("<I", data[140:144])[0]


def dcm_files(inbox) -> list[Path]:
    return sorted(Path(inbox).glob("*.dcm"))


# --------------------------------------------------------------------------- what is accepted
def test_accepted_sop_classes_and_transfer_syntaxes_are_the_standard_ones():
    # the four DX/MG storage SOP classes of PS3.4 Table B.5-1, as pynetdicom (a reference implementation) names them
    want = {
        sc.DigitalXRayImageStorageForPresentation,
        sc.DigitalXRayImageStorageForProcessing,
        sc.DigitalMammographyXRayImageStorageForPresentation,
        sc.DigitalMammographyXRayImageStorageForProcessing,
    }
    assert set(STORAGE_SOP_CLASSES) == {str(u) for u in want}
    # uncompressed or lossless only (names from pydicom's copy of the PS3.6 UID registry), each one decodable
    from pydicom.pixels import get_decoder
    from pydicom.uid import UID

    for uid in TRANSFER_SYNTAXES:
        name = UID(uid).name
        assert "Lossless" in name or name.endswith("Little Endian"), name
        assert get_decoder(uid).is_available, name
    assert "1.2.840.10008.1.2.4.50" not in TRANSFER_SYNTAXES  # JPEG Baseline (lossy)


def test_file_names_are_the_uid_or_a_safe_stand_in():
    assert file_name_for("1.2.826.0.1.3680043.8.498.1", b"") == "1.2.826.0.1.3680043.8.498.1.dcm"
    for bad in ("../../etc/passwd", ".hidden", "a/b\\c d", "1.2." + "9" * 80):
        name = file_name_for(bad, b"x")
        assert "/" not in name and "\\" not in name and not name.startswith(".") and name.endswith(".dcm"), name
        assert len(name) <= 64 + 6
    assert file_name_for("", b"abc").startswith("sha256-")
    assert file_name_for("///", b"abc").startswith("sha256-")


# --------------------------------------------------------------------------- the network tests
def test_echo_is_answered(node):
    assoc = scu().associate(node.host, node.port, ae_title=OURS)
    assert assoc.is_established
    status = assoc.send_c_echo()
    assoc.release()
    assert status.Status == SUCCESS  # PS3.4 A.4 / PS3.7 9.3.5: Success 0000
    line = node.wait_lines(1)[0]
    assert line.startswith(f"association {MODALITY} from 127.0.0.1:") and "released" in line
    assert "1 echo(es)" in line and "0 image(s) stored" in line and "0 image(s) refused" in line and "\n" not in line


def test_images_are_stored_byte_complete_and_read_by_the_nightly_scanner(node, tmp_path):
    sent = night(tmp_path / "modality", D1, ["direct"], n_images=2)
    assoc = scu().associate(node.host, node.port, ae_title=OURS)
    assert assoc.is_established
    statuses = [assoc.send_c_store(p).Status for p in sent]
    again = assoc.send_c_store(sent[0]).Status  # the modality sends one image twice
    assoc.release()
    assert statuses == [SUCCESS, SUCCESS] and again == SUCCESS
    line = node.wait_lines(1)[0]
    assert "2 image(s) stored" in line and "1 already in the inbox" in line and "0 image(s) refused" in line

    inbox = Path(node.config.inbox)
    stored = dcm_files(inbox)
    assert len(stored) == 2
    assert not [p for p in inbox.iterdir() if p.name.startswith(".")]  # no temporary left behind
    for src in sent:
        uid = pydicom.dcmread(src, stop_before_pixels=True).SOPInstanceUID
        dst = inbox / f"{uid}.dcm"
        a, b = src.read_bytes(), dst.read_bytes()
        # the dataset as sent, byte for byte, behind a Part 10 preamble and meta (PS3.10 7.1)
        assert b[128:132] == b"DICM"
        assert b[meta_end(b) :] == a[meta_end(a) :]
        got, want = pydicom.dcmread(dst), pydicom.dcmread(src)
        assert got.file_meta.MediaStorageSOPInstanceUID == uid
        assert (got.pixel_array == want.pixel_array).all()

    # what `limen nightly` scans: every received file listed and placed in its detector's session
    config = load_config(write_config(tmp_path / "cfg"))

    listed = list_files(inbox)
    assert sorted(listed) == stored
    for p in listed:
        got = examine(p, hashlib.sha256(p.read_bytes()).hexdigest(), config)  # as nightly calls it
        assert isinstance(got, InboxImage), got
        assert got.detector == DIRECT and got.session_date == D1.isoformat()


def test_lossless_compressed_images_are_stored_as_sent(node, tmp_path):
    from scorer.images import write_dicom

    src = night(tmp_path / "modality", D1, ["direct"], n_images=1)[0]
    ds = pydicom.dcmread(src)
    tags = {k: ds[k].value for k in ("DetectorID", "AcquisitionDateTime", "KVP", "Modality")}
    jls = write_dicom(tmp_path / "jls.dcm", ds.pixel_array, (0.085, 0.085), tags, transfer_syntax="jpeg-ls-lossless")
    assoc = scu(transfer_syntaxes=["1.2.840.10008.1.2.4.80"]).associate(node.host, node.port, ae_title=OURS)
    assert assoc.send_c_store(jls).Status == SUCCESS
    assoc.release()
    node.wait_lines(1)
    (out,) = dcm_files(node.config.inbox)
    got = pydicom.dcmread(out)
    assert got.file_meta.TransferSyntaxUID == "1.2.840.10008.1.2.4.80"
    assert (got.pixel_array == ds.pixel_array).all()


def test_for_presentation_images_are_received_and_left_to_nightly(node, tmp_path):
    src = night(tmp_path / "modality", D1, ["direct"], n_images=1)[0]
    ds = pydicom.dcmread(src)
    ds.SOPClassUID = MG_PRESENTATION
    ds.file_meta.MediaStorageSOPClassUID = MG_PRESENTATION
    ds.PresentationIntentType = "FOR PRESENTATION"
    assoc = scu(contexts=(MG_PRESENTATION,)).associate(node.host, node.port, ae_title=OURS)
    assert assoc.send_c_store(ds).Status == SUCCESS
    assoc.release()
    node.wait_lines(1)
    (out,) = dcm_files(node.config.inbox)
    config = load_config(write_config(tmp_path / "cfg"))
    verdict = examine(out, "0" * 64, config)
    assert isinstance(verdict, Rejected) and "FOR PRESENTATION" in verdict.reason


def test_other_sop_classes_and_lossy_syntaxes_are_refused_in_negotiation(node, tmp_path):
    ae = scu(contexts=(CT,))
    ae.add_requested_context(MG_PROCESSING, ["1.2.840.10008.1.2.4.50"])  # JPEG Baseline only: lossy
    assoc = ae.associate(node.host, node.port, ae_title=OURS)
    assert assoc.is_established  # Verification was accepted
    results = {str(cx.abstract_syntax): cx.result for cx in assoc.rejected_contexts}
    # PS3.8 9.3.3.2: 3 abstract-syntax-not-supported, 4 transfer-syntaxes-not-supported
    assert results == {CT: 3, MG_PROCESSING: 4}
    ct = pydicom.dcmread(night(tmp_path / "modality", D1, ["direct"], n_images=1)[0])
    ct.SOPClassUID = CT
    with pytest.raises(ValueError):  # no accepted context to carry it
        assoc.send_c_store(ct)
    assoc.release()
    line = node.wait_lines(1)[0]
    assert (
        "0 image(s) refused, 2 proposed context(s) not accepted: Digital Mammography X-Ray Image Storage - For " in line
    )
    assert "(no acceptable transfer syntax); CT Image Storage (1.2.840.10008.5.1.4.1.1.2) (abstract syntax " in line
    assert dcm_files(node.config.inbox) == []


class _Event:
    """The parts of a pynetdicom C-STORE event the receiver reads."""

    def __init__(self, ds, abstract_syntax, raw=None):
        self.context = type("Cx", (), {"abstract_syntax": abstract_syntax})()
        self._ds, self._raw = ds, raw

    @property
    def dataset(self):
        if self._ds is None:
            raise ValueError("undecodable")
        return self._ds

    def encoded_dataset(self, include_meta=True):
        return self._raw


def test_dataset_that_does_not_match_its_context_is_refused_with_a9xx(tmp_path):
    # PS3.4 Table B.2-1: A900 Error: Data Set does not match SOP Class; C000 Error: Cannot understand
    r = Receiver(ReceiveConfig(inbox=str(tmp_path), calling_ae_titles=(MODALITY,)), log=lambda s: None)
    ds = pydicom.Dataset()
    ds.SOPClassUID, ds.SOPInstanceUID = CT, "1.2.3"
    assert r.store(_Event(ds, MG_PROCESSING, b"x"))[0] == DOES_NOT_MATCH_SOP_CLASS
    ds.SOPClassUID = MG_PROCESSING
    del ds.SOPInstanceUID
    assert r.store(_Event(ds, MG_PROCESSING, b"x"))[0] == DOES_NOT_MATCH_SOP_CLASS
    assert r.store(_Event(None, MG_PROCESSING))[0] == CANNOT_UNDERSTAND
    assert list(tmp_path.iterdir()) == []


def test_unknown_calling_or_called_ae_title_is_rejected_at_association(node):
    assoc = scu(title="INTRUDER").associate(node.host, node.port, ae_title=OURS)
    assert assoc.is_rejected
    rj = assoc.acceptor.primitive
    assert (rj.result, rj.result_source, rj.diagnostic) == (1, 1, 3)  # PS3.8 9.3.4, Table 9-21
    assoc = scu().associate(node.host, node.port, ae_title="SOMEONE_ELSE")
    assert assoc.is_rejected
    rj = assoc.acceptor.primitive
    assert (rj.result, rj.result_source, rj.diagnostic) == (1, 1, 7)
    lines = node.wait_lines(2)
    assert any(x.startswith("association INTRUDER from 127.0.0.1:") and "calling AE title not in" in x for x in lines)
    assert any(f"association {MODALITY}" in x and "called AE title is not ours" in x for x in lines)


# --------------------------------------------------------------------------- a dataset cut off mid-association
def _pdu(kind: int, body: bytes) -> bytes:
    return struct.pack(">BBI", kind, 0, len(body)) + body  # PS3.8 9.3.1: type, reserved, length


def _recv_pdu(sock) -> tuple[int, bytes]:
    head = b""
    while len(head) < 6:
        chunk = sock.recv(6 - len(head))
        assert chunk, "connection closed"
        head += chunk
    kind, _, n = struct.unpack(">BBI", head)
    body = b""
    while len(body) < n:
        body += sock.recv(n - len(body))
    return kind, body


def _send_part_of_a_store(host, port, path, how: str) -> None:
    """Associate over a raw socket, send the C-STORE command and the first fragments of its dataset, then
    close the socket (``how="close"``) or send A-ABORT (``"abort"``), as a modality losing power would."""
    from pynetdicom.dimse_messages import C_STORE_RQ
    from pynetdicom.dimse_primitives import C_STORE
    from pynetdicom.pdu import A_ASSOCIATE_RQ, P_DATA_TF
    from pynetdicom.pdu_primitives import (
        A_ASSOCIATE,
        ImplementationClassUIDNotification,
        MaximumLengthNotification,
    )
    from pynetdicom.presentation import build_context

    rq = A_ASSOCIATE()
    rq.application_context_name = "1.2.840.10008.3.1.1.1"
    rq.calling_ae_title, rq.called_ae_title = MODALITY, OURS
    cx = build_context(MG_PROCESSING, ["1.2.840.10008.1.2.1"])
    cx.context_id = 1
    rq.presentation_context_definition_list = [cx]
    ml = MaximumLengthNotification()
    ml.maximum_length_received = 16382
    impl = ImplementationClassUIDNotification()
    impl.implementation_class_uid = "1.2.826.0.1.3680043.9.7777.1"
    rq.user_information = [ml, impl]
    pdu = A_ASSOCIATE_RQ()
    pdu.from_primitive(rq)

    raw = path.read_bytes()
    ds = pydicom.dcmread(path, stop_before_pixels=True)
    store = C_STORE()
    store.MessageID, store.Priority = 1, 2
    store.AffectedSOPClassUID, store.AffectedSOPInstanceUID = MG_PROCESSING, ds.SOPInstanceUID
    store.DataSet = io.BytesIO(raw[meta_end(raw) :])
    msg = C_STORE_RQ()
    msg.primitive_to_message(store)
    fragments = list(msg.encode_msg(1, 16382))
    assert len(fragments) > 6  # the dataset spans many P-DATA-TF PDUs; we send 4 of them

    with socket.create_connection((host, port), timeout=20) as sock:
        sock.sendall(pdu.encode())
        kind, _ = _recv_pdu(sock)
        assert kind == 0x02  # A-ASSOCIATE-AC
        for p in fragments[:4]:
            data = P_DATA_TF()
            data.from_primitive(p)
            sock.sendall(data.encode())
        if how == "abort":
            sock.sendall(_pdu(0x07, bytes([0, 0, 0, 0])))  # A-ABORT, source service-user (PS3.8 9.3.8)
        time.sleep(0.2)


@pytest.mark.parametrize("how", ["close", "abort"])
def test_a_dataset_cut_off_mid_association_leaves_no_file(node, tmp_path, how):
    src = night(tmp_path / "modality", D1, ["direct"], n_images=1)[0]
    _send_part_of_a_store(node.host, node.port, src, how)
    line = node.wait_lines(1)[0]
    assert f"association {MODALITY}" in line and "0 image(s) stored" in line
    assert "ended without release (aborted or connection lost)" in line or ": aborted" in line
    inbox = Path(node.config.inbox)
    assert list(inbox.iterdir()) == [] and list_files(inbox) == []
    # the node is still serving: the whole image arrives on the next association
    assoc = scu().associate(node.host, node.port, ae_title=OURS)
    assert assoc.send_c_store(src).Status == SUCCESS
    assoc.release()
    node.wait_lines(2)
    assert len(dcm_files(inbox)) == 1


# --------------------------------------------------------------------------- the command, as a process
def _config(tmp_path, name="nightly.toml", **receive) -> Path:
    lines = ['format = "limen-nightly/1"', "[receive]"]
    values = {"ae_title": OURS, "inbox": "inbox", "calling_ae_titles": [MODALITY], **receive}
    for k, v in values.items():
        lines.append(f"{k} = " + (f'"{v}"' if isinstance(v, str) else str(v).replace("'", '"')))
    p = tmp_path / name
    p.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return p


def _start(cfg, env_extra=None):
    env = dict(os.environ)
    env.pop("LIMEN_FAULT_INJECT", None)
    env.update(env_extra or {})
    proc = subprocess.Popen(
        [sys.executable, "-m", "scorer.cli", "receive", "--config", str(cfg), "--port", "0"],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        env=env,
    )
    first = proc.stdout.readline()
    assert "listening on 127.0.0.1:" in first, first + proc.stderr.read()
    port = int(first.split("listening on 127.0.0.1:")[1].split(",")[0])
    return proc, port


def test_sigkill_right_after_an_acknowledged_store_keeps_the_file(tmp_path):
    cfg = _config(tmp_path)
    sent = night(tmp_path / "modality", D1, ["direct"], n_images=3)
    proc, port = _start(cfg)
    try:
        assoc = scu().associate("127.0.0.1", port, ae_title=OURS)
        statuses = [assoc.send_c_store(p).Status for p in sent]
        proc.send_signal(signal.SIGKILL)  # at once after the last acknowledgement, association still open
        proc.wait(timeout=20)
    finally:
        proc.kill()
        proc.wait()
    assert statuses == [SUCCESS] * 3
    inbox = tmp_path / "inbox"
    for src in sent:
        uid = pydicom.dcmread(src, stop_before_pixels=True).SOPInstanceUID
        a, b = src.read_bytes(), (inbox / f"{uid}.dcm").read_bytes()
        assert b[meta_end(b) :] == a[meta_end(a) :]  # complete, byte for byte


def test_killed_while_writing_leaves_nothing_the_scanner_sees(tmp_path):
    # LIMEN_FAULT_INJECT=write kills the receiver half-way through writing the image's temporary file
    cfg = _config(tmp_path)
    src = night(tmp_path / "modality", D1, ["direct"], n_images=1)[0]
    proc, port = _start(cfg, {"LIMEN_FAULT_INJECT": "write:1"})
    try:
        assoc = scu().associate("127.0.0.1", port, ae_title=OURS)
        status = assoc.send_c_store(src)
        assert proc.wait(timeout=20) == -signal.SIGKILL
    finally:
        proc.kill()
        proc.wait()
    assert "Status" not in status  # never acknowledged
    inbox = tmp_path / "inbox"
    assert dcm_files(inbox) == [] and list_files(inbox) == []
    assert [p.name.endswith(".part") and p.name.startswith(".") for p in inbox.iterdir()] == [True]


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGINT])
def test_signal_stops_it_cleanly(tmp_path, sig):
    proc, port = _start(_config(tmp_path))
    try:
        assoc = scu().associate("127.0.0.1", port, ae_title=OURS)
        assert assoc.send_c_echo().Status == SUCCESS
        assoc.release()
        line = proc.stdout.readline()
        assert f"association {MODALITY} from 127.0.0.1:" in line and "released" in line
        proc.send_signal(sig)
        out, err = proc.communicate(timeout=30)
    finally:
        proc.kill()
        proc.wait()
    assert proc.returncode == 0, err
    assert (
        out.strip()
        .splitlines()[-1]
        .endswith("stopped: 1 association(s) (0 rejected), 0 image(s) stored, 0 image(s) refused")
    )
    assert err == ""


def test_bad_configuration_gives_one_line_and_exit_2(tmp_path):
    busy = socket.socket()
    busy.bind(("127.0.0.1", 0))
    busy.listen()
    (tmp_path / "afile").write_text("x")
    # 192.0.2.1 lies in TEST-NET-1 (RFC 5737), never an address of this machine
    cases = {
        "in use": (_config(tmp_path, "a.toml", port=busy.getsockname()[1]), "the port is already in use"),
        "host": (_config(tmp_path, "b.toml", bind="no-such-host.invalid"), "cannot resolve the address"),
        "not ours": (
            _config(tmp_path, "c.toml", bind="192.0.2.1"),
            "the address is not one of this machine's",
        ),  # RFC 5737
        "inbox": (_config(tmp_path, "d.toml", inbox="afile/inbox"), "inbox is not a writable folder"),
        "ae": (_config(tmp_path, "e.toml", calling_ae_titles=["BACK\\\\SLASH"]), "DICOM AE title"),
    }
    try:
        for what, (cfg, message) in cases.items():
            text = cfg.read_text()
            res = CliRunner().invoke(main, ["receive", "--config", str(cfg)])
            assert res.exit_code == 2, (what, text, res.output)
            assert res.output.startswith("error: ") and message in res.output, (what, res.output)
            assert res.output.count("\n") == 1 and str(cfg) in res.output, res.output
    finally:
        busy.close()
    p = tmp_path / "plain.toml"
    p.write_text('format = "limen-nightly/1"\n')
    res = CliRunner().invoke(main, ["receive", "--config", str(p)])
    assert res.exit_code == 2 and "no [receive] table" in res.output


def test_receive_reads_only_its_own_table(tmp_path):
    # a detector entry that `limen nightly` would refuse does not stop the receiver
    p = _config(tmp_path)
    p.write_text(p.read_text() + '[[detectors]]\ndetector_id = "A"\nlayout = "missing.toml"\n')
    rc = load_receive_config(p)
    assert rc.inbox == str((tmp_path / "inbox").resolve()) and rc.calling_ae_titles == (MODALITY,)
    with pytest.raises(LimenError, match="missing.toml"):
        load_config(p)


def test_concurrent_associations_store_every_image_once(node, tmp_path):
    sent = night(tmp_path / "modality", D1, ["direct", "indirect"], n_images=2)
    results = []

    def send(paths):
        assoc = scu().associate(node.host, node.port, ae_title=OURS)
        results.extend(assoc.send_c_store(p).Status for p in paths)
        assoc.release()

    threads = [threading.Thread(target=send, args=(sent[i::2],)) for i in range(2)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(60)
    node.wait_lines(2)
    assert results == [SUCCESS] * 4
    assert len(dcm_files(node.config.inbox)) == 4


def test_sigterm_lets_an_open_association_finish(tmp_path):
    # a modality half-way through its images when the service stops: what it still sends within the grace
    # period is stored and acknowledged; new associations are no longer accepted
    sent = night(tmp_path / "modality", D1, ["direct"], n_images=2)
    proc, port = _start(_config(tmp_path))
    try:
        assoc = scu().associate("127.0.0.1", port, ae_title=OURS)
        assert assoc.send_c_store(sent[0]).Status == SUCCESS
        proc.send_signal(signal.SIGTERM)
        assert "SIGTERM: no new associations" in proc.stdout.readline()
        late = scu().associate("127.0.0.1", port, ae_title=OURS)
        assert not late.is_established
        assert assoc.send_c_store(sent[1]).Status == SUCCESS
        assoc.release()
        out, err = proc.communicate(timeout=30)
    finally:
        proc.kill()
        proc.wait()
    assert proc.returncode == 0, err
    assert "2 image(s) stored" in out and out.strip().endswith("2 image(s) stored, 0 image(s) refused")
    assert len(dcm_files(tmp_path / "inbox")) == 2


def test_an_image_that_cannot_be_written_is_refused_with_a7xx(node, tmp_path):
    # PS3.4 Table B.2-1: A700 Refused: Out of Resources -- never a success for an image that is not on disk
    src = night(tmp_path / "modality", D1, ["direct"], n_images=1)[0]
    inbox = Path(node.config.inbox)
    inbox.rmdir()
    inbox.write_text("the inbox was replaced by a file\n")
    assoc = scu().associate(node.host, node.port, ae_title=OURS)
    status = assoc.send_c_store(src).Status
    assoc.release()
    assert 0xA700 <= status <= 0xA7FF
    lines = node.wait_lines(2)
    assert lines[0].startswith("error: ") and str(inbox) in lines[0]
    assert "0 image(s) stored, 1 image(s) refused (status 0xA700: cannot write it to the inbox)" in lines[1]
