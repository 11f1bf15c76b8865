package bench

import (
	"context"
	"os"
	"runtime"
	"runtime/pprof"
	"strconv"
	"testing"
	"time"
)

func TestTmpLoad(t *testing.T) {
	n, _ := strconv.Atoi(os.Getenv("LOAD_DEVICES"))
	if n == 0 {
		t.Skip()
	}
	d, _ := time.ParseDuration(os.Getenv("LOAD_DURATION"))
	go func() {
		if os.Getenv("LOAD_HEAP") == "" {
			return
		}
		time.Sleep(d / 2)
		f, _ := os.Create("/tmp/heap.pprof")
		pprof.Lookup("heap").WriteTo(f, 0)
		f.Close()
		var ms runtime.MemStats
		runtime.ReadMemStats(&ms)
		t.Logf("goroutines %d heapinuse %d MiB stackinuse %d MiB sys %d MiB heapsys %d MiB", runtime.NumGoroutine(), ms.HeapInuse>>20, ms.StackInuse>>20, ms.Sys>>20, ms.HeapSys>>20)
	}()
	res, err := Run(context.Background(), Options{Devices: n, Duration: d, Progress: os.Stderr, CPUProfile: os.Getenv("LOAD_PROF"), Client: clientFor(), DevicesPerConn: atoi(os.Getenv("LOAD_PERCONN"))}, SinkPhase())
	if err != nil {
		t.Fatal(err)
	}
	t.Logf("%+v", *res)
}

func clientFor() ClientFunc {
	if e := os.Getenv("LOAD_EXE"); e != "" {
		return ExecClient(e, os.Stderr, os.Getenv("LOAD_PROF"))
	}
	return nil
}

func atoi(s string) int { n, _ := strconv.Atoi(s); return n }
