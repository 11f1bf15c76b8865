package gateway

import (
	"crypto/sha256"
	"encoding/hex"
	"io"
	"os"
	"path/filepath"
	"testing"
	"time"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// Backup needs the admin role, streams a snapshot whose bytes hash to the
// closing SHA-256 and pass the full check, and is audited under the
// caller's name.
func TestBackupRoleChecksumAndAudit(t *testing.T) {
	h := newHarness(t, nil)
	admin := issue(t, h, "", &pb.IssueTokenRequest{Operator: "admin-bk", Role: pb.Role_ROLE_ADMIN})
	viewer := issue(t, h, admin, &pb.IssueTokenRequest{Operator: "viewer-bk", Role: pb.Role_ROLE_VIEWER})
	dev := issue(t, h, admin, &pb.IssueTokenRequest{DeviceId: "bed-bk"})
	d := h.openAs(t, dev)
	d.send(&pb.ConnectRequest{Kind: &pb.ConnectRequest_Introduction{Introduction: summaryIntro("bed-bk")}})
	base := time.Now().Add(-time.Minute).UnixMilli()
	for i := uint64(1); i <= 5; i++ {
		d.send(summary(i, base+int64(i)*1000, 97))
	}
	d.waitAck(5)

	st, err := h.admin().Backup(bearer(viewer), &pb.BackupRequest{})
	if err == nil {
		_, err = st.Recv()
	}
	if status.Code(err) != codes.PermissionDenied {
		t.Errorf("backup with a viewer credential: %v, want PermissionDenied", err)
	}

	st, err = h.admin().Backup(bearer(admin), &pb.BackupRequest{})
	if err != nil {
		t.Fatal(err)
	}
	var data []byte
	var size int64
	var storeID, sum string
	for {
		m, err := st.Recv()
		if err == io.EOF {
			break
		}
		if err != nil {
			t.Fatal(err)
		}
		if m.GetSizeBytes() > 0 {
			size, storeID = m.GetSizeBytes(), m.GetStoreId()
		}
		data = append(data, m.GetChunk()...)
		if m.GetSha256() != "" {
			sum = m.GetSha256()
		}
	}
	h32 := sha256.Sum256(data)
	if sum != hex.EncodeToString(h32[:]) || int64(len(data)) != size || storeID != h.db.ID() {
		t.Fatalf("backup: %d bytes of %d, store %q (want %q), sha256 %q (bytes hash to %x)", len(data), size, storeID, h.db.ID(), sum, h32)
	}
	p := filepath.Join(t.TempDir(), "b.db")
	os.WriteFile(p, data, 0o600)
	rep, err := store.VerifyFile(p, store.VerifyOptions{})
	if err != nil || !rep.OK() || rep.Records["cursors"] != 1 {
		t.Fatalf("snapshot check: %v %+v", err, rep)
	}
	es, err := h.db.Audit(0, "backup.", 0)
	if err != nil {
		t.Fatal(err)
	}
	if len(es) != 2 || es[0].Action != "backup.done" || es[1].Action != "backup.start" || es[0].Actor != "operator:admin-bk" && es[0].Actor != "admin-bk" {
		t.Errorf("audit entries %+v, want backup.start and backup.done by admin-bk", es)
	}
}
