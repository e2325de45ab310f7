"""Shared by the probes that write a modified copy of independent-renderer scenes
(``exposure_scene.py``, ``geometry_scene.py``): the copy's folder, links to what stays unchanged,
and folders that are written into, which never resolve into the datasets folder."""
import os
import sys


class SceneCopy:
    """The copy ``OUT/independent-scenes`` of the datasets' ``root`` (refused when it lies inside
    ``root``, whose files would then be overwritten)."""

    def __init__(self, root, out):
        self.root = root
        self.real_root = os.path.realpath(root)
        self.dst = os.path.join(out, "independent-scenes")
        if os.path.realpath(self.dst) == self.real_root or os.path.realpath(out).startswith(self.real_root + os.sep):
            sys.exit(f"--out {out} lies in the datasets folder {root}: the frames there would be overwritten")
        os.makedirs(self.dst, exist_ok=True)

    @staticmethod
    def link(src, dst_path):
        """Link `dst_path` to `src` unless something is there already."""
        if not os.path.lexists(dst_path):
            os.symlink(src, dst_path)

    def link_all_but(self, keep):
        """Link every entry of the datasets folder except the names in `keep` into the copy."""
        for name in os.listdir(self.root):
            if name not in keep:
                self.link(os.path.join(self.root, name), os.path.join(self.dst, name))

    def own_folder(self, path):
        """A folder this run writes into: never a link into the datasets (an earlier run for
        another scene links that scene there), so writes cannot reach the originals."""
        if os.path.islink(path):
            os.unlink(path)
        os.makedirs(path, exist_ok=True)
        if os.path.realpath(path).startswith(self.real_root + os.sep):
            sys.exit(f"{path} resolves into the datasets folder {self.root}: refusing to write there")
