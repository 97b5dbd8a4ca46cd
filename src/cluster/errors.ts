/** The error of sharded runs and cluster jobs (exit 9, README "Exit codes"). */
import { CairnError, EXIT } from "../errors.js";

/**
 * A sharded run failed: a shard (or its cluster job) failed, or the shards cannot be merged into
 * a release equal to a single run (they disagree on rows they share, or the merge's own result
 * differs from theirs). The message names the shard and what to do.
 */
export class ClusterError extends CairnError {
  constructor(message: string) {
    super(message, EXIT.cluster);
  }
}
