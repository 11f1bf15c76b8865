package notify

import (
	"testing"
	"time"

	"github.com/pulsefleet/pulsefleet/internal/notify/notifytest"
	"github.com/pulsefleet/pulsefleet/internal/store"
)

// How fast a backlog drains into a real Alertmanager (after an outage, say):
// each iteration queues 200 announced episodes in one store batch and waits
// until the outbox is empty again. Reported as notifications/s.
//
//	go test ./internal/notify -run x -bench OutboxDrain -benchtime 10x
func BenchmarkOutboxDrain(b *testing.B) {
	recv := notifytest.NewReceiver(b)
	am := notifytest.Start(b, notifytest.Config(recv.URL("/am")))
	db, err := store.Open(b.TempDir(), store.Options{})
	if err != nil {
		b.Fatal(err)
	}
	defer db.Close()
	n, err := New(Options{URLs: []string{am.URL}, Store: db, Gateway: "bench"})
	if err != nil {
		b.Fatal(err)
	}
	db.EnableOutbox(n.Kick)
	stop := runFor(n)
	defer stop()
	const per = 200
	id := uint64(0)
	now := time.Now().UnixMilli()
	b.ResetTimer()
	for i := 0; i < b.N; i++ {
		batch := &store.Batch{}
		for j := 0; j < per; j++ {
			id++
			batch.Episodes = append(batch.Episodes, &store.Episode{ID: id, Device: "bench-dev", Condition: "spo2_low", Priority: "high",
				OnsetMS: now - 20_000, AnnouncedMS: now - 5_000, MinSpO2: 85, Limit: 90, Active: true})
		}
		if err := db.Write(batch); err != nil {
			b.Fatal(err)
		}
		for {
			_, q, err := db.Outbox(1)
			if err != nil {
				b.Fatal(err)
			}
			if q == 0 {
				break
			}
			time.Sleep(time.Millisecond)
		}
	}
	b.ReportMetric(float64(b.N*per)/b.Elapsed().Seconds(), "notifications/s")
}

// What queueing costs a store batch that carries episodes: the same batch
// of 10 announced episodes written with the outbox off and on.
//
//	go test ./internal/notify -run x -bench WriteEpisodes
func BenchmarkWriteEpisodes(b *testing.B) {
	for _, on := range []bool{false, true} {
		name := "outbox-off"
		if on {
			name = "outbox-on"
		}
		b.Run(name, func(b *testing.B) {
			db, err := store.Open(b.TempDir(), store.Options{})
			if err != nil {
				b.Fatal(err)
			}
			defer db.Close()
			if on {
				db.EnableOutbox(nil)
			}
			now := time.Now().UnixMilli()
			id := uint64(0)
			for i := 0; i < b.N; i++ {
				batch := &store.Batch{}
				for j := 0; j < 10; j++ {
					id++
					batch.Episodes = append(batch.Episodes, &store.Episode{ID: id, Device: "bench-dev", Condition: "spo2_low", Priority: "high",
						OnsetMS: now, AnnouncedMS: now + 15_000, MinSpO2: 85, Active: true})
				}
				if err := db.Write(batch); err != nil {
					b.Fatal(err)
				}
			}
		})
	}
}
