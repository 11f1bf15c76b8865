package gateway

import (
	"fmt"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"github.com/pulsefleet/pulsefleet/internal/auth"
	"github.com/pulsefleet/pulsefleet/internal/store"
	pb "github.com/pulsefleet/pulsefleet/proto/pulsefleet/v1"
)

// backupChunk is the most snapshot bytes one BackupResponse carries.
const backupChunk = 256 << 10

// Backup implements AdminService: a consistent snapshot of the store
// (store.DB.Snapshot) streamed in chunks, the SHA-256 in the last message.
// Audited when it starts and when it ends.
func (g *Gateway) Backup(_ *pb.BackupRequest, ss pb.AdminService_BackupServer) error {
	ctx := ss.Context()
	actor, remote := auth.ActorFrom(ctx), auth.RemoteFrom(ctx)
	now := g.opt.Now()
	if err := g.db.AppendAudit(&store.AuditEntry{TimeMS: now.UnixMilli(), Actor: actor, Action: "backup.start", Detail: "snapshot streamed over gRPC", Remote: remote}); err != nil {
		return status.Errorf(codes.Unavailable, "backup: audit: %v", err)
	}
	w := &chunkSender{send: ss.Send, buf: make([]byte, 0, backupChunk)}
	n, err := g.db.Snapshot(w, func(info store.SnapshotInfo) error {
		w.first = &pb.BackupResponse{SizeBytes: info.Size, StoreId: info.StoreID, TakenUnixMs: info.Taken.UnixMilli()}
		return nil
	})
	if err == nil {
		err = w.flush()
	}
	if err == nil {
		err = ss.Send(&pb.BackupResponse{Sha256: w.sum()})
	}
	detail := fmt.Sprintf("snapshot of %d bytes, sha256 %s", n, w.sum())
	action := "backup.done"
	if err != nil {
		action, detail = "backup.failed", fmt.Sprintf("after %d bytes: %v", n, err)
	}
	if aerr := g.db.AppendAudit(&store.AuditEntry{TimeMS: g.opt.Now().UnixMilli(), Actor: actor, Action: action, Detail: detail, Remote: remote}); aerr != nil {
		g.log.Warn("backup audit entry not written", "err", aerr)
	}
	if err != nil {
		g.log.Warn("backup failed", "by", actor, "bytes", n, "err", err)
		if ctx.Err() != nil {
			return status.FromContextError(ctx.Err()).Err()
		}
		return status.Errorf(codes.Unavailable, "backup: %v", err)
	}
	g.log.Info("backup streamed", "by", actor, "bytes", n)
	return nil
}
